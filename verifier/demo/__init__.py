"""The demo: an invented codebase with assistant commits, and scratch repositories built with real git."""
