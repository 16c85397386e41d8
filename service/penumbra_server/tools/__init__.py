"""Developer tools (code generation); not imported by the server at run time."""
