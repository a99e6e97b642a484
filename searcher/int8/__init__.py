"""Integer-only int8 arithmetic (numpy, no torch): quantize a trained net, run it, score it; used by the search and the export."""
