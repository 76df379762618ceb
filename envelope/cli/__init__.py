"""Command-line front end (installed as ``envelope.cli``): parse, call the library, report."""
