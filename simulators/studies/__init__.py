"""Seeded population studies: preload scatter, cue timing, angle accuracy."""
