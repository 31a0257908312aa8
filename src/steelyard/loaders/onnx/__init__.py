"""ONNX models: ``loader`` (the :class:`OnnxLoader`: drafts finished into layers), ``wire``
(content sniff and the protobuf pass that keeps weight bytes on disk), ``stored`` (element
types, stored tensors, nodes, Constant values), ``lookthrough`` (the stored tensor behind an op
input), ``quantized`` (float views of quantized weights), ``layer_builder`` (nodes as layer
drafts, with ``layer_draft`` and ``recurrent``), ``node_graph`` (scoped names, producers and
consumers), ``op_kinds``, ``output_walk`` and ``input_walk`` (the walks that find biases,
norms, activations and links) and ``tensor_roles`` (which stored tensors are parameters)."""
