"""Stage 4b of the flow: alternative tests of the interaction (and main effects)."""
