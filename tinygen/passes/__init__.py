"""Graph -> Graph passes over the integer IR, each doing one thing (see each docstring)."""
