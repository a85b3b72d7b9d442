"""The check pipeline itself: validated inputs (``inputs``), comparison with a reference (``compare``),
settling failing entries before anyone is blamed (``settle``, ``rounding``, ``noise``, ``confirm``),
the budget policy (``budget``) and the one pipeline every entry point runs (``run``)."""
