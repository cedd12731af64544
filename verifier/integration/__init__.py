"""Where the gate meets git and CI: the hooks it installs and the helpers CI runs."""
