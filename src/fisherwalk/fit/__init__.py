"""The Laplace fit: mode, observed Fisher information, its checks, other modes."""
