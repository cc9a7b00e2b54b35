"""Live analyzers: acquire a reflection sweep over SCPI, and a simulated analyzer for tests.

    from instruments import Analyzer, load_profile, save_touchstone

    with Analyzer("TCPIP::192.168.0.20::5025::SOCKET", load_profile("generic-scpi")) as vna:
        sweep = vna.acquire(800e6, 1.0e9, 1601, 1e3, dut_id="A-017")   # a pipeline.sweep.Sweep
    save_touchstone(sweep, "A-017.s1p")

Modules: ``visa`` (the pyvisa session), ``profile`` (SCPI dialects from
``configs/analyzers/*.toml``), ``analyzer`` (the acquisition steps), ``simulator`` (a
SCPI server on 127.0.0.1 that serves a Touchstone file or a model).
"""

import logging

from instruments.analyzer import Analyzer, SweepSettings, save_touchstone
from instruments.profile import Profile, load_profile
from instruments.simulator import Faults, SeriesRLC, SimulatedAnalyzer
from instruments.visa import DEFAULT_VISA_LIBRARY

# A library stays quiet unless its user configures logging (retry warnings are reported
# to the caller through the result and the exceptions).
logging.getLogger("instruments").addHandler(logging.NullHandler())

__all__ = ["Analyzer", "SweepSettings", "save_touchstone", "Profile", "load_profile", "Faults", "SeriesRLC",
           "SimulatedAnalyzer", "DEFAULT_VISA_LIBRARY"]
