"""ballpass: a bolt-on vibration monitor for small pumps and fans.

Public entry points
-------------------
- ``agent.cli.main``: the ``ballpass`` command.
- ``agent.config.load_config``: TOML file to frozen settings.
- ``agent.pipeline.Pipeline``: fixed-memory analysis of one measurement point.
- ``agent.dsp``: pure numeric functions (levels, spectra, envelope, bearings).
"""

__version__ = "0.1.0"
