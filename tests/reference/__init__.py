"""Stored reference documents and the script that writes them (see regenerate.py)."""
