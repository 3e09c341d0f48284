//! Unit tests of the ONNX reader.
