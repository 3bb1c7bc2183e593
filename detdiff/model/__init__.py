"""Model stage: the small detector, its anchors, box coding, per-item loss streams and postprocessing."""
