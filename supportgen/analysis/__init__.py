"""Stage 2, the part as the printer sees it: placement, overhangs, layer masks, islands, verification."""
