"""Reading masks and images, writing label images, TSV tables and atomic writes."""
