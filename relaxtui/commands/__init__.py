"""One module per subcommand; each exposes ``run(args) -> int``."""
