"""Infinite-width theory: mean field (length and correlation maps) and free probability."""
