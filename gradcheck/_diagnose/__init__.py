"""Naming the mistake: the registry of finding kinds (``kinds``) and of transfer functions (``transfers``),
whole-tensor signatures (``signatures``), claimed deltas at probes (``deltas``), mutants of the traced
backward pass (``mutants`` over ``program``), ranking (``ranking``), repeated calls (``repeat``) and the
update step (``step``)."""
