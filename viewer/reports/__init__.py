"""reports layer of Headlight (see DEVELOPERS.md for the layering)."""
