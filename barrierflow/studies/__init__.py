"""Studies: what is done with many runs of one scenario (fitting to data, designing experiments, ...).

Each study is a function taking a :class:`~barrierflow.Scenario` and parameter paths
(:mod:`barrierflow.model.paths`) and returning a frozen result with its own reports. Studies sit
above the analysis layer and below the command line and the dashboard::

    dashboard, cli -> studies -> analysis -> engine -> io -> model -> units, errors
"""
