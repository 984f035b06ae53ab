"""The one table of flowpipe's names and choices.

Methods, schemes and options that a user can choose, and every output variable
with its CF attributes. This module imports nothing (not even the rest of
flowpipe), so that the config, the command line, the stages and the annotation
take their names from one place, and validating a config loads no numerical
library.
"""

from __future__ import annotations

import os
from pathlib import PurePath

#: Decomposition methods (:func:`flowpipe.decompose.decompose`).
METHODS = ("auto", "spectral", "regional")
#: Limited-area schemes (:mod:`flowpipe.regional`).
SCHEMES = ("variational", "dirichlet")
#: Vertical velocities of 3-D trajectories: name, level type they need, factor to level
#: units per second (Pa s-1 to hPa s-1, m s-1 to m s-1).
VERTICAL = {"omega": ("pressure", 0.01), "w": ("height", 1.0)}
#: Largest plausible horizontal wind speed, m s-1. The largest speeds ever analysed in the
#: atmosphere are about 135 m s-1 (Doppler radar in the Bridge Creek-Moore tornado of
#: 3 May 1999) and about 120 m s-1 in the strongest jet streams and polar-night jets
#: (*from memory*; no source at hand). 250 m s-1 leaves room for the upper stratosphere and
#: mesosphere of deep reanalyses while catching fill values and unit mistakes (1e30, knots
#: as cm s-1, ...).
DEFAULT_MAX_SPEED = 250.0
#: Map projections (:func:`flowpipe.render`, ``--projection``).
PROJECTIONS = ("auto", "globe", "north-cap", "south-cap", "area", "lat-lon")
#: What to do with values that are not finite or faster than the limit.
IMPLAUSIBLE_CHOICES = ("refuse", "missing")
#: Trajectory status flag meanings, in the order of the flag values 0, 1, 2, ...
STATUS_MEANINGS = ("completed", "left_domain", "reached_lowest_level", "reached_highest_level",
                   "met_missing_wind", "outside_domain_at_start")

#: Output variables: standard_name (or None), units, long_name.
VARIABLES: dict[str, tuple[str | None, str, str]] = {
    "streamfunction": ("atmosphere_horizontal_streamfunction", "m2 s-1", "streamfunction"),
    "velocity_potential": ("atmosphere_horizontal_velocity_potential", "m2 s-1",
                           "velocity potential"),
    "vorticity": ("atmosphere_relative_vorticity", "s-1", "relative vorticity"),
    "divergence": ("divergence_of_wind", "s-1", "horizontal divergence"),
    "u_rotational": (None, "m s-1", "eastward component of the rotational (non-divergent) wind"),
    "v_rotational": (None, "m s-1", "northward component of the rotational (non-divergent) wind"),
    "u_divergent": (None, "m s-1", "eastward component of the divergent (irrotational) wind"),
    "v_divergent": (None, "m s-1", "northward component of the divergent (irrotational) wind"),
    "u_harmonic": (None, "m s-1",
                   "eastward component of the harmonic (non-divergent and irrotational) wind"),
    "v_harmonic": (None, "m s-1",
                   "northward component of the harmonic (non-divergent and irrotational) wind"),
    "u_unresolved": (None, "m s-1",
                     "eastward wind at valid points not carried by the band-limited rotational "
                     "and divergent winds"),
    "v_unresolved": (None, "m s-1",
                     "northward wind at valid points not carried by the band-limited rotational "
                     "and divergent winds"),
    # wind speed and direction (flowpipe.fields)
    "wind_speed": ("wind_speed", "m s-1", "wind speed"),
    "wind_from_direction": ("wind_from_direction", "degree",
                            "direction the wind blows from, clockwise from north"),
    "rotational_wind_speed": (None, "m s-1", "speed of the rotational (non-divergent) wind"),
    "rotational_wind_from_direction": (None, "degree", "direction the rotational wind blows "
                                       "from, clockwise from north"),
    "divergent_wind_speed": (None, "m s-1", "speed of the divergent (irrotational) wind"),
    "divergent_wind_from_direction": (None, "degree", "direction the divergent wind blows "
                                      "from, clockwise from north"),
    # kinematics
    "absolute_vorticity": ("atmosphere_absolute_vorticity", "s-1", "absolute vorticity"),
    "stretching_deformation": (None, "s-1", "stretching deformation"),
    "shearing_deformation": (None, "s-1", "shearing deformation"),
    "total_deformation": (None, "s-1", "total deformation"),
    "kinetic_energy_rotational": (None, "m2 s-2",
                                  "kinetic energy per unit mass of the rotational wind"),
    "kinetic_energy_divergent": (None, "m2 s-2",
                                 "kinetic energy per unit mass of the divergent wind"),
    "kinetic_energy_spectrum_rotational": (
        None, "m2 s-2", "global-mean kinetic energy per unit mass of the rotational wind "
        "per total wavenumber"),
    "kinetic_energy_spectrum_divergent": (
        None, "m2 s-2", "global-mean kinetic energy per unit mass of the divergent wind "
        "per total wavenumber"),
}

#: The spectral decomposition's fields, in kernel output order.
SPECTRAL_VARIABLES = ("streamfunction", "velocity_potential", "vorticity", "divergence",
                      "u_rotational", "v_rotational", "u_divergent", "v_divergent")
#: What the masked spectral route adds to them (:mod:`flowpipe.masked`).
UNRESOLVED_VARIABLES = ("u_unresolved", "v_unresolved")
#: The regional decomposition's fields (both schemes), in kernel output order.
REGIONAL_VARIABLES = SPECTRAL_VARIABLES + ("u_harmonic", "v_harmonic")
#: Spectra by total wavenumber among the kinematics.
SPECTRA = ("kinetic_energy_spectrum_rotational", "kinetic_energy_spectrum_divergent")
#: The kinematics, in kernel output order (the spectra last).
KINEMATIC_VARIABLES = ("absolute_vorticity", "stretching_deformation", "shearing_deformation",
                       "total_deformation", "kinetic_energy_rotational",
                       "kinetic_energy_divergent") + SPECTRA

#: Quality figures: data variables per latitude-longitude slab, and how the global
#: figure of the same name (an attribute, set when the figures are known) sums them up:
#: the largest slab, or the total.
QUALITY_FIGURES = {
    "reconstruction_error": "max",
    "unresolved_fraction": "max",
    "harmonic_energy_share": "max",
    "harmonic_rotation": "max",
    "iterations": "max",
    "points_left_missing": "sum",
}

#: Wind speed and direction a decomposition can add (``--fields``): name -> (its wind's
#: u and v, the quantity). The full wind is the input's.
WIND_PRODUCTS: dict[str, tuple[str, str, str]] = {
    "wind_speed": ("u", "v", "speed"),
    "wind_from_direction": ("u", "v", "direction"),
    "rotational_wind_speed": ("u_rotational", "v_rotational", "speed"),
    "rotational_wind_from_direction": ("u_rotational", "v_rotational", "direction"),
    "divergent_wind_speed": ("u_divergent", "v_divergent", "speed"),
    "divergent_wind_from_direction": ("u_divergent", "v_divergent", "direction"),
}
#: Variables ``--fields`` always keeps: the figures that say how good the fields are.
KEPT_WITH_FIELDS = (*QUALITY_FIGURES, "solver")
#: Figures the run report shows for each output (the worst slab), with circulation's
#: line-against-area checks.
REPORTED_FIGURES = (*QUALITY_FIGURES, "vorticity_disagreement", "divergence_disagreement")

#: Storage precision of floating-point data variables (:func:`flowpipe.write`): as the
#: wind was stored (``input``, the default), or always single or double.
PRECISIONS = ("input", "single", "double")
#: Lossless encodings of data variables (zlib with shuffle; the netCDF4 library applies
#: shuffle with zlib only). The default is zlib at level 1: every netCDF-4 reader decodes
#: it, and it writes in about two thirds of the time of level 4. zstd needs netCDF-C 4.9
#: or later (or the netCDF4/h5py wheels with their filter plugins) to be read back.
COMPRESSIONS = ("zlib", "zstd", "none")
DEFAULT_COMPRESSION = "zlib"
#: The default of Zarr stores: zstd inside Zarr's core blosc codec, which every blosc
#: build decodes (c-blosc carries zstd), and which writes a 0.25 degree field in a
#: quarter of the time zlib takes (17 against 72 ms, numcodecs, measured here).
ZARR_DEFAULT_COMPRESSION = "zstd"
DEFAULT_LEVEL = {"zlib": 1, "zstd": 1}
#: Levels each library accepts (zlib 1-9; zstd 1-22 in netCDF-C's filter).
LEVEL_RANGES = {"zlib": (1, 9), "zstd": (1, 22)}
#: The suffix of outputs written as a Zarr store (a directory) instead of NetCDF-4.
ZARR_SUFFIX = ".zarr"
#: Significant decimal digits quantization can keep, by bytes of the stored type:
#: single precision holds about 7 (CF section 8.4.2).
MAX_SIGNIFICANT_DIGITS = {4: 7, 8: 15}


#: The suffixes of NetCDF file names that the writing commands accept (besides
#: :data:`ZARR_SUFFIX`); ``.nc`` is the common one (NetCDF User Guide, file naming).
NETCDF_SUFFIXES = (".nc", ".nc4", ".cdf", ".netcdf")


def is_zarr_path(path: str | os.PathLike) -> bool:
    """Whether an output or input name is a Zarr store's (ends in :data:`ZARR_SUFFIX`);
    every other name is a NetCDF-4 file's."""
    return PurePath(path).suffix == ZARR_SUFFIX


def output_suffix_refusal(path: str | os.PathLike) -> str | None:
    """Why a data output's name is refused (a suffix that promises another format, or
    none), or None for a NetCDF (:data:`NETCDF_SUFFIXES`) or Zarr name."""
    if is_zarr_path(path) or PurePath(path).suffix.lower() in NETCDF_SUFFIXES:
        return None
    return (f"{path} would be a NetCDF-4 file under a name that does not say so; name it "
            f"*.nc (or {', '.join(NETCDF_SUFFIXES[1:])}), or *{ZARR_SUFFIX} for a Zarr store")


def compression_for(compression: str | None, output: str | os.PathLike | None) -> str:
    """The compression asked for, or by default that of the output's format: zlib for
    NetCDF (every netCDF-4 reader), zstd for a Zarr store (:data:`ZARR_DEFAULT_COMPRESSION`)."""
    if compression is not None:
        return compression
    zarr_store = output is not None and is_zarr_path(output)
    return ZARR_DEFAULT_COMPRESSION if zarr_store else DEFAULT_COMPRESSION


def encoding_refusal(precision: str = "input", compression: str | None = None,
                     compression_level: int | None = None,
                     significant_digits: int | None = None) -> str | None:
    """Why an encoding of :func:`flowpipe.write` is refused, or None when it is allowed
    (``compression`` None: the format's default, :func:`compression_for`)."""
    compression = compression_for(compression, None)
    if precision not in PRECISIONS:
        return f"precision {precision!r} is not one of {', '.join(PRECISIONS)}"
    if compression not in COMPRESSIONS:
        return f"compression {compression!r} is not one of {', '.join(COMPRESSIONS)}"
    if compression_level is not None:
        if compression == "none":
            return "a compression level needs a compression: drop the level or choose zlib or zstd"
        low, high = LEVEL_RANGES[compression]
        if not low <= compression_level <= high:
            return f"{compression} compression level must be {low} to {high}, not {compression_level}"
    if significant_digits is not None:
        most = MAX_SIGNIFICANT_DIGITS[4 if precision == "single" else 8]
        if not 1 <= significant_digits <= most:
            return (f"significant digits must be 1 to {most} (at most 7 for single precision), "
                    f"not {significant_digits}")
    return None


def levels_hint(table: str, option: str = "--levels") -> str:
    """Where the levels are chosen, for messages: the command's ``option``, and the key of
    the config table ``table``."""
    return f"{option} (config: [{table}] levels)"
