"""Routes to the principal components: in memory, feature Gram, sample Gram (exact), sketch (randomized).

Each route module holds one function ``run(inp: RouteInput) -> Decomposition``
and a ``fixed_bytes(n, m, rank)`` estimate of the memory its state needs.
"""

from rankfold.routes import features, memory, samples, sketch

ROUTES = {"memory": memory, "features": features, "samples": samples, "sketch": sketch}

__all__ = ["ROUTES"]
