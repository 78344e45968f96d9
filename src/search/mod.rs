//! Complete verification by branch and bound over ReLU activation states.
