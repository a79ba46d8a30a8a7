"""Stage 3, separation physics: the pressure field of each layer, separation laws, loads per contact, calibration."""
