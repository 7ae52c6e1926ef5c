"""Write a trained model as a serving artifact: the ONNX step graph and the tables beside it."""
