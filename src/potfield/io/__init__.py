"""Readers and writers. Every writer is atomic: it writes a temporary file and renames it."""
