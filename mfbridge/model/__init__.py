"""What the user states: the grid, the potentials U and W, the endpoint laws (parametric or from
sample files), nonlinear mobilities, and the :class:`~mfbridge.model.problem.BridgeProblem` that
holds them, validated up front.

Layer: imports only :mod:`mfbridge.errors` and its own modules.
"""
