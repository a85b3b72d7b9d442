"""The public entry points: ``examine``, ``assert_backprop`` and ``reference`` (``examine``), ``examine_layer``
(``layer``), and the wrapper that names the entry point in every InputError (``entry``). Each is a thin
front over :mod:`gradcheck._check.run`."""
