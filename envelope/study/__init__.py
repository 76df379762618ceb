"""The study: its file schema, its run folder layout, the runner and the report."""
