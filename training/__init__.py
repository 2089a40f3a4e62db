"""kilter trainer half: logs in, a calibrated bidirectional LSTM reconstructor out (ONNX)."""
