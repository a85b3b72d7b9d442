"""Where users meet the library outside Python calls: the ``gradcheck`` command (``cli``), the built-in demo
(``demo``) and the pytest plugin (``pytest_plugin``)."""
