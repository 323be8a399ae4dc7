"""Use cases: learn, scan, watch, status, version comparison. No argparse and no printing;
progress is handed in."""
