"""torch: an architecture built as a module, and its short proxy training."""
