"""The tool wing: what the ``kalmax`` command and the demo do around the numerical core.

One job a module: error classes (``errors``), all-or-nothing outputs
(``atomic_outputs``), stop signals during a command (``signals``), tables (``tables``), the model spec and its text
settings (``spec``, ``settings``), composed models on the command line
(``composed``), the model file (``model_file``), table →
series (``series``), time units and patterns (``time_units``), forecast rows
(``horizon``), starting values, objectives, the fit and apply workflows, and
the report. The numerical core (``kalmax/_src/*.py``,
``backends/``) never imports this package.
"""
