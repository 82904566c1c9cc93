"""Fictional scenarios and the forward model that renders them into raw visits.

The reducer never imports this package; only the ``simulate`` and ``demo``
commands wire it to the tasks.
"""
