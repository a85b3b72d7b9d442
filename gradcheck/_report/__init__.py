"""The results a check returns (``results``: Report, TensorResult, Finding, ...), their HTML and
matplotlib renderings (``html``), and the listeners told about every finished report (``listeners``)."""
