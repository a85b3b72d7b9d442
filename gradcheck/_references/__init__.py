"""Reference gradients: the registry of methods with their cost and accuracy (``registry``), each
finite-difference scheme written once (``finite_difference``: central differences, Richardson extrapolation,
the complex step), the JAX autodiff reference (``autodiff``), and which references a check computes
(``choose``)."""
