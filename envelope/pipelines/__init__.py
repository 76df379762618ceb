"""Pipelines: paths in, files out; what the command line and the study runner both call."""
