"""Imports the built-in families so they register."""
