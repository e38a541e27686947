"""The methods: the outer fixed-point loop with the correction potential V
(:mod:`~mfbridge.solvers.fixed_point`), multi-start (:mod:`~mfbridge.solvers.multistart`), the
direct action solver for nonlinear mobilities (:mod:`~mfbridge.solvers.direct` with its action
and optimisers), the exact linear–quadratic bridge
(:mod:`~mfbridge.solvers.linear_quadratic`), and the exact quasi-potential of the open exclusion
process (:mod:`~mfbridge.solvers.open_ssep`, a reference for tests and experiments).

Layer: imports the model, the numerics and the root modules, never the particles or the runs
layer.
"""
