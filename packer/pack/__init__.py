"""Packing: float model -> one int8 bundle (vocabulary selection, quantisation, folding, graph, bundle file),
and describing or exporting a written bundle."""
