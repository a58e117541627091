"""clef: HEALPix sky maps to angular power spectra, from Python.

A thin layer over the clef C library (docs/python.md): numpy float64 maps in
RING order (NaN marks a missing pixel), complex128 a_lm in clef's m-major
layout, results as numpy arrays and dicts.  The library does the work; its
errors are raised as clef.Error subclasses carrying its message and status
code, and its messages go to the logging logger "clef" (silent unless the
application configures logging).
"""
import logging as _logging

from ._clef import *  # noqa: F401,F403  (the C extension: every function and class)
from ._clef import __version__  # noqa: F401

# A library must not print: without this handler Python's last-resort
# handler would write the logger's warnings to stderr.
_logging.getLogger("clef").addHandler(_logging.NullHandler())
