raise ImportError("the calibration module is missing")
