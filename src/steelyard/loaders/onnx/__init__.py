"""ONNX models: ``loader`` (the :class:`OnnxLoader` and its layer builder), ``wire`` (content
sniff and the protobuf pass that keeps weight bytes on disk), ``stored`` (element types,
stored tensors, nodes, Constant values), ``lookthrough`` (the stored tensor behind an op
input), ``quantized`` (float views of quantized weights) and ``node_graph`` (scoped names and
the walks over edges)."""
