"""matchbay: measured S11 in, a buildable L-network matching network out.

The package is a functional core (de-embedding, matching, metrics: pure functions on
numpy arrays and scikit-rf networks) inside a thin shell (acquisition, the HDF5 store,
the folder watcher, the CLI). See DEVELOPERS.md for the map.
"""

__version__ = "0.1.0"
