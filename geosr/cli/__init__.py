"""The ``geosr`` command line: a thin click skin over the library.

``geosr.cli.main:main`` is the console script, ``geosr.cli.main:rio_geosr``
the ``rio geosr`` plugin. Library modules are imported inside the command
functions, so ``geosr --help`` stays fast.
"""
