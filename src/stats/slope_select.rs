//! Exact selection of the k-th smallest pairwise slope (being written).
