"""The single reader and writer of each file one stage writes and another reads."""
