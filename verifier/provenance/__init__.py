"""The provenance stage: which added lines a model wrote (trailers, blame through the range)."""
