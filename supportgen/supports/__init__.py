"""Stage 4, the supports: contacts, strategies (straight, tree), free space, sizing, bracing, solids."""
