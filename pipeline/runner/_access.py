"""Reading a night's products back: the public loaders behind ``pipeline.open_product``."""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING, Any

from pipeline.config import Config
from pipeline.products import FLUX_EXTENSION, ccddata_from_hdulist
from pipeline.runner._night import night_dir
from pipeline.runner._store import read_product, read_sidecar

if TYPE_CHECKING:
    from astropy.nddata import CCDData

__all__ = ["open_product", "product_path", "read_image"]


def read_image(path: str | Path) -> CCDData:
    """Read an image product file (see :mod:`pipeline.products`) as CCDData.

    Parameters
    ----------
    path : str or pathlib.Path
        E.g. ``<output_dir>/<night>/rectify/s0001/image.fits``.

    Returns
    -------
    astropy.nddata.CCDData
        See :func:`pipeline.products.ccddata_from_hdulist`.
    """
    from astropy.io import fits

    with fits.open(path, memmap=False) as hdul:
        return ccddata_from_hdulist(hdul)


def _unit_name(unit: str | int) -> str:
    if isinstance(unit, int):
        if unit < 0:
            raise ValueError(f"unit: a stretch index must be >= 0; got {unit}.")
        return f"s{unit:04d}"
    return str(unit)


def _locate(
    config: Config, stage: str, unit: str | int, product: str | None
) -> tuple[Path, dict[str, Any]]:
    unit_dir = night_dir(config) / stage / _unit_name(unit)
    sidecar = read_sidecar(unit_dir)
    if sidecar is None:
        raise ValueError(
            f"{stage}/{_unit_name(unit)} has no complete products in {unit_dir}; run the "
            f"night (pipeline.run_night or `zdrift run`) and check pipeline.night_status."
        )
    products = sidecar["products"]
    if product is None:
        only = len(products) == 1 and "image" not in products
        product = next(iter(products)) if only else "image"
    if product not in products:
        raise ValueError(
            f"{stage}/{_unit_name(unit)} has no product {product!r}; it has "
            f"{', '.join(sorted(products))} (pass product=...)."
        )
    entry = products[product]
    return unit_dir / entry["file"], entry


def product_path(
    config: Config, stage: str, unit: str | int = "night", product: str | None = None
) -> Path:
    """Path of one product file of a finished unit (arguments as :func:`open_product`).

    Raises
    ------
    ValueError
        If the unit is not done or has no such product.
    """
    return _locate(config, stage, unit, product)[0]


def open_product(
    config: Config, stage: str, unit: str | int = "night", product: str | None = None
) -> Any:
    """One product of a finished unit of the night.

    Parameters
    ----------
    config : Config
        The night's config (:func:`pipeline.load_config`).
    stage : str
        Stage name, e.g. ``'rectify'``.
    unit : str or int, optional
        ``'night'`` (night-scoped stages), a stretch id such as ``'s0001'`` or
        a stretch index such as ``1``.
    product : str, optional
        Product name (the file name without suffix); default the unit's image
        product (``image``), else its only product.

    Returns
    -------
    astropy.nddata.CCDData, astropy.table.Table, dict, list or ndarray
        An image product as CCDData (:func:`read_image`), a table as the
        Table class the stage returned, JSON as dict/list.

    Raises
    ------
    ValueError
        If the unit is not done or has no such product (the message lists
        what it has).
    """
    from astropy.io import fits

    path, entry = _locate(config, stage, unit, product)
    value = read_product(path, entry)
    if isinstance(value, fits.HDUList) and FLUX_EXTENSION in value:
        return ccddata_from_hdulist(value)
    return value
