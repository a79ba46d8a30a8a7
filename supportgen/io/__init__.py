"""Stage 1, mesh files: read and validate STL/OBJ/PLY/3MF, repair, write atomically."""
