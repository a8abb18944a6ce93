"""Internal coordinates (Z-matrix, NeRF, Jacobians) and the clash and stereo guards."""
