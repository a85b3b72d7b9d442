"""What every stage shares: the two exceptions and their message helpers (``errors``), named tensors of a
parameter pytree (``tree``), the precision facts every tolerance is built from (``precision``), and the one
caller of the user's loss (``evaluator``)."""
