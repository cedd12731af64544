"""The change stage: a revision spec becomes a Change (base, head, commits, files, hunks)."""
