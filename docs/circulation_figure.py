"""Draw docs/circulation_demo_storm.png from the README's circulation example.

Usage: python docs/circulation_figure.py storm.nc docs/circulation_demo_storm.png
"""

from __future__ import annotations

import sys

import matplotlib.figure
import xarray as xr


def main(source: str, target: str) -> None:
    with xr.open_dataset(source) as ds:
        fig = matplotlib.figure.Figure(figsize=(9, 3.4), layout="constrained")
        left, right = fig.subplots(1, 2)
        for k, style in zip(range(ds.sizes["contour"]), ("-", "--"), strict=False):
            name = str(ds.contour_name.values[k])
            for level, marker in ((850.0, "o"), (500.0, "s")):
                sel = ds.sel(level=level).isel(contour=k)
                left.plot(sel.time, sel.circulation / 1e6, style, marker=marker,
                          label=f"{name}, {level:g} hPa")
            right.plot(ds.time, ds.omega.sel(level=500.0).isel(contour=k), style, marker="s",
                       label=name)
        left.set_ylabel("circulation (10$^6$ m$^2$ s$^{-1}$)")
        right.set_ylabel("kinematic omega at 500 hPa (Pa s$^{-1}$)")
        for ax in (left, right):
            ax.tick_params(axis="x", labelrotation=30)
            ax.legend(fontsize=7)
            ax.grid(alpha=0.3)
        fig.suptitle("Invented demo storm: a circle following its track against a fixed box",
                     fontsize=10)
        fig.savefig(target, dpi=110)


if __name__ == "__main__":
    main(sys.argv[1], sys.argv[2])
