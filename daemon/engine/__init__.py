"""The tightening engine: a pure, I/O-free state machine per wrench (see _machine.py)."""
