"""The demo side of danpack: an invented scenario (drivers' comments on public EV chargers),
a numpy DAN trainer with three embedding regimes, and the small shipped demo models.

    python -m danpack.models_demo.scenario --out DIR [--seed N] [--small]   # write the demo data
    python -m danpack.models_demo.build [--check]                           # rebuild the shipped models
"""
