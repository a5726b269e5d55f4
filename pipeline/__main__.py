"""``python -m pipeline`` behaves exactly like the ``lesion-growth`` command."""
from pipeline.cli import main

if __name__ == "__main__":
    main()
