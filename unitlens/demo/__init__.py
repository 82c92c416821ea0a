"""Demo material for unitlens: a procedural image corpus whose generating factors are known."""
