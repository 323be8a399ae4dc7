"""Bytes and rows to core objects and back: frame files (the only reader of image files),
the baseline store, the frame ledger and review labels (SQLite), and the one result writer."""
