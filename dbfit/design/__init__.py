"""The design: the profiling scan, factor typing and the encodings of the internal columns."""
