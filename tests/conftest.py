import sys
from pathlib import Path

from hypothesis import settings

sys.path.insert(0, str(Path(__file__).parent))

# Per-example deadlines flake on loaded CI machines (common practice; no published source).
settings.register_profile("ci", deadline=None, max_examples=40)
settings.load_profile("ci")
