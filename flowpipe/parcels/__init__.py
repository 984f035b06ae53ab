"""Parcel trajectories through gridded winds, forward and backward, 2-D and 3-D.

* :func:`advect` - the stage: starts and a lazy canonical wind Dataset in,
  a CF trajectory Dataset out (only the input times bracketing each step are
  read);
* :mod:`.starts` - start tables from ``--start`` options, CSV files and the
  generators :func:`starts_line`, :func:`starts_box`, :func:`starts_ring`;
* ``_kernels`` - the compiled sampling and integration kernels;
  ``_window`` - the streaming of time slices; ``_geometry`` - the sphere.
"""

from ._advect import advect
from .starts import read_starts, starts_box, starts_line, starts_ring

__all__ = ["advect", "read_starts", "starts_box", "starts_line", "starts_ring"]
