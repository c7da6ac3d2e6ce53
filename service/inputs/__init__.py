"""Bodies and files -> checked training and scoring inputs (no web imports), shared by the routes and the CLI."""
