"""The `penumbra` command line: serve, demo, runs, watch, report (entry point :func:`main.main`)."""
