"""Where and how many evaluations run: perturbations and runners (this process or an executor), the
vectorised JAX runner, directional tests with group testing for checks on a budget, and the progress bar."""
