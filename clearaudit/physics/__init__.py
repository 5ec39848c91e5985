"""Line physics: pure, vectorised functions in SI units (m, N, N/m, Pa, °C)."""
