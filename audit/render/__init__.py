"""Stage 6 of the flow: rendering (text, JSON, figures).  Never computes statistics."""
