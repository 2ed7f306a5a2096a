"""Stage 4a of the flow: assumption and design diagnostics (graded findings)."""
