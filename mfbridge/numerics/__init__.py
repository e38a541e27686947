"""Building blocks with no notion of a bridge: the reference chain's jump rates and the pair
field (:mod:`~mfbridge.numerics.reference`), the action of e^{τQ}
(:mod:`~mfbridge.numerics.propagator`), the static entropic (Sinkhorn) sub-problem
(:mod:`~mfbridge.numerics.entropic`), Anderson mixing, truncated Newton, and observables of a
flow (moments, entropy, free energy, flux actions).

Layer: imports the model and the root modules (errors, result), never the solvers, the particles
or the runs layer.
"""
