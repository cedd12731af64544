"""The command line: one module per subcommand, each owning its options, thin over the Python API."""
