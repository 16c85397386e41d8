"""Generated wire code for penumbra.v1 (do not edit; run ``make wire`` to regenerate)."""
