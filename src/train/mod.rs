//! Training: gradients, optimisers, plain and robust losses, the primal-dual loop.
