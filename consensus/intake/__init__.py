"""Intake: read and check every input file before anything is written."""
