"""The detect and catalog stages through the runner: per-stretch units with their
neighbours' edge columns, the night catalogue, bad input and reruns.

Self-consistency tests on an invented scene (tests/_seam_graph.py): a
stand-in for rectify cuts it into stretches that tile the night's columns.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
from _seam_graph import (
    FLUX,
    GRAPH_WITH_DETECT,
    SHAPE,
    STARS_X,
    STRETCH_ROWS,
    StandInOptions,
    seam_night_data,
    stand_in_rectify,
)
from _toy_graph import edit_raw_block
from astropy.table import QTable, Table

from pipeline.config import config_from_mapping
from pipeline.runner import night_status, open_product, product_path, run_night
from pipeline.runner._night import NightStore
from pipeline.stages import detect
from pipeline.stages.base import NEIGHBOURS, RAW_ROWS, plan_stretches
from pipeline.stages.detect import DetectOptions, SourceFlag


@pytest.fixture
def seam_night(tmp_path):
    """``make_config(*overrides)`` for the stand-in night under ``tmp_path``."""
    data = seam_night_data(tmp_path)
    return lambda *overrides: config_from_mapping(data, overrides, graph=GRAPH_WITH_DETECT)


def _ran(report, stage: str) -> list[str]:
    return sorted(r.unit for r in report.results if r.stage == stage and r.status == "ran")


def _flags(catalog) -> np.ndarray:
    return catalog["flags"].value.astype(int)


def test_seam_stars_are_measured_whole_and_listed_once(seam_night):
    config = seam_night("run.executor=local", "run.workers=2")
    report = run_night(config)
    assert report.ok, report.format()
    assert _ran(report, "detect") == ["s0000", "s0001", "s0002", "s0003"]
    catalog = open_product(config, "catalog", "night", "catalog")
    # Each star once, in the stretch whose own columns hold its x (seams at
    # x = 199.5 and 399.5).
    order = np.argsort(catalog["x"].value)
    np.testing.assert_allclose(
        catalog["x"].value[order], STARS_X, atol=0.05
    )  # 10 sigma at S/N ~200
    assert list(catalog["stretch"].value[order].astype(int)) == [0, 1, 2, 2]
    # Whole: the seam stars' fluxes are the truth to 2 % (about 4 sigma at S/N ~200, and
    # far below what losing a side of the star would cost), they used the
    # neighbour's columns (OVERLAP) and saw no edge.
    np.testing.assert_allclose(catalog["flux_psf"].value, FLUX, rtol=0.02)
    seam = np.isin(np.round(catalog["x"].value, 1), [199.2, 399.8])
    assert seam.sum() == 2
    assert np.all(_flags(catalog)[seam] & SourceFlag.OVERLAP)
    assert not np.any(_flags(catalog) & SourceFlag.EDGE)
    # The stretch catalogues hold the same sources; the empty stretch warned.
    per_stretch = [len(open_product(config, "detect", i, "catalog")) for i in range(4)]
    assert per_stretch == [1, 1, 2, 0]
    warnings = report_warnings(config, "detect", "s0003")
    assert any("DetectWarning: no source above" in w for w in warnings)
    seeing = open_product(config, "catalog", "night", "seeing")
    assert sorted(set(seeing["stretch"].tolist())) == [0, 1, 2, 3]
    # The night records detect's settings once, as each stretch did (astrometry
    # measures again with them), and no one stretch's seeing as the night's.
    stretch = open_product(config, "detect", 0, "catalog")
    assert catalog.meta["aperture_radii_fwhm"] == stretch.meta["aperture_radii_fwhm"]
    assert catalog.meta["detect_options"] == stretch.meta["detect_options"]
    assert DetectOptions(**catalog.meta["detect_options"]) == DetectOptions()
    assert "seeing_fwhm" not in catalog.meta
    # The integer columns read back as integers, however a user reads the
    # files: a dimensionless Quantity came back as floats, on which a test of
    # a flag bit raised TypeError.
    for path in (
        product_path(config, "detect", 0, "catalog"),
        product_path(config, "catalog", "night", "catalog"),
        product_path(config, "catalog", "night", "seeing"),
    ):
        for reader in (Table, QTable):
            table = reader.read(path, format="ascii.ecsv")
            integers = {"group", "flags", "stretch", "n_stars", "mask_near", "mask_core"}
            for name in integers & set(table.colnames):
                assert table[name].dtype.kind == "i" and table[name].unit is None, (path, name)
            if "flags" in table.colnames:
                assert (table["flags"] & SourceFlag.OVERLAP).dtype.kind == "i"
    # ... and keeps the mask bits the flags come from, next to them, described
    names = catalog.colnames
    assert names[names.index("flags") + 1 : names.index("flags") + 3] == ["mask_near", "mask_core"]
    assert "MaskBit" in catalog["mask_core"].info.description
    assert catalog.meta["mask_bits"] == stretch.meta["mask_bits"]
    # An unchanged night reruns nothing.
    again = run_night(config)
    assert again.ok and again.count("ran") == 0


def report_warnings(config, stage: str, unit: str) -> list[str]:
    """The warnings a unit's provenance records."""
    night = NightStore(config)
    return night.sidecar(night.stages[stage], unit)["warnings"]


def test_a_changed_rectified_stretch_reruns_its_detect_unit_and_neighbours_only(
    seam_night, tmp_path
):
    config = seam_night()
    assert run_night(config).ok
    edit_raw_block(tmp_path / "raw", 1)  # changes the stand-in's product of stretch 1 only
    report = run_night(config)
    assert _ran(report, "rectify") == ["s0001"]
    assert _ran(report, "detect") == ["s0000", "s0001", "s0002"]
    assert night_status(config).complete


def test_a_failed_neighbour_and_a_fully_flagged_stretch(seam_night):
    config = seam_night("stages.rectify.fail_on=[1]", "stages.rectify.flag_all=[3]")
    report = run_night(config)
    by_unit = {(r.stage, r.unit): r for r in report.results}
    assert by_unit[("rectify", "s0001")].status == "failed"
    assert by_unit[("detect", "s0001")].status == "blocked"
    # The stretches beside the failed one ran without it, and said so.
    for unit in ("s0000", "s0002"):
        assert by_unit[("detect", unit)].status == "ran"
        assert (
            "ran without neighbour s0001 (failed in rectify)" in by_unit[("detect", unit)].problems
        )
    # Their seam stars lost the neighbour's side: flagged at an edge.
    for index, x in ((0, 199.2), (2, 399.8)):
        catalog = open_product(config, "detect", index, "catalog")
        near = np.abs(catalog["x"].value - x) < 0.5
        assert near.sum() == 1 and _flags(catalog)[near][0] & SourceFlag.EDGE
    # The fully flagged stretch: an empty catalogue and a reported problem.
    flagged = by_unit[("detect", "s0003")]
    assert flagged.status == "ran" and any("no usable pixel" in p for p in flagged.problems)
    assert len(open_product(config, "detect", 3, "catalog")) == 0
    # The night catalogue went on without the missing stretch.
    night = by_unit[("catalog", "night")]
    assert night.status == "ran"
    assert night.problems == ("ran without stretch s0001 (blocked in detect)",)
    assert len(open_product(config, "catalog", "night", "catalog")) == 3
    assert not report.ok
    # Fixed: every stretch is measured, the seam stars whole again.
    report = run_night(seam_night())
    assert report.ok, report.format()
    catalog = open_product(config, "catalog", "night", "catalog")
    assert len(catalog) == 4 and not np.any(_flags(catalog) & SourceFlag.EDGE)


def test_the_stage_takes_the_noise_correlation_from_the_rectified_header(seam_night):
    config = seam_night()
    plan = plan_stretches(SHAPE[1], STRETCH_ROWS, 0)
    context = dataclasses.replace(NightStore(config).context, stretch=plan[1], stretches=plan)
    raw = np.zeros((STRETCH_ROWS, 6), np.float32)
    errors = []
    for noise_correlation in (1.0, 2.0):
        options = StandInOptions(noise_correlation=noise_correlation)
        products = [
            stand_in_rectify(
                inputs={RAW_ROWS: raw},
                options=options,
                context=dataclasses.replace(context, stretch=s),
            )
            for s in plan[:3]
        ]
        inputs = {"rectify": products[1], NEIGHBOURS: {"rectify": (products[0], products[2])}}
        out = detect.STAGE.run(inputs=inputs, options=DetectOptions(), context=context)
        assert len(out["catalog"]) == 1  # the star at x = 300
        errors.append(out["catalog"]["flux_psf_err"].value[0])
    # sqrt(NOISECOR): see test_noise_correlation_lowers_significance_and_widens_errors;
    # 1e-4 as there.
    assert errors[1] / errors[0] == pytest.approx(np.sqrt(2.0), rel=1e-4)


def test_the_stage_lets_detect_reuse_its_padded_planes(seam_night, monkeypatch):
    config = seam_night()
    plan = plan_stretches(SHAPE[1], STRETCH_ROWS, 0)
    context = dataclasses.replace(NightStore(config).context, stretch=plan[1], stretches=plan)
    raw = np.zeros((STRETCH_ROWS, 6), np.float32)

    def rectified(stretch):
        return stand_in_rectify(
            inputs={RAW_ROWS: raw},
            options=StandInOptions(),
            context=dataclasses.replace(context, stretch=stretch),
        )

    neighbours = (rectified(plan[0]), rectified(plan[2]))
    stored = [p["image"]["FLUX"].data.copy() for p in neighbours]
    real, seen = detect.detect, []
    catalogs, owns = [], []
    for reuse in (True, False):

        def spy(*args, overwrite_input, reuse=reuse, **kwargs):
            seen.append(overwrite_input)
            return real(*args, overwrite_input=overwrite_input and reuse, **kwargs)

        monkeypatch.setattr(detect, "detect", spy)
        owns.append(rectified(plan[1]))  # the runner reads the unit's inputs for it
        inputs = {"rectify": owns[-1], NEIGHBOURS: {"rectify": neighbours}}
        out = detect.STAGE.run(inputs=inputs, options=DetectOptions(), context=context)
        catalogs.append(out["catalog"])
    # the padded planes are the stage's own copies: detect may overwrite them, the
    # neighbours' rectified products stay as they were, and the unit's own
    # product (its input, read for it) has its planes dropped once padded
    assert seen == [True, True]
    for product, flux in zip(neighbours, stored, strict=True):
        assert np.array_equal(product["image"]["FLUX"].data, flux, equal_nan=True)
    for own in owns:
        assert "data" not in vars(own["image"]["FLUX"])
    assert len(catalogs[0]) == 1
    for name in catalogs[0].colnames:
        assert np.array_equal(catalogs[0][name], catalogs[1][name], equal_nan=True), name


def test_the_night_catalogue_keeps_the_metadata_its_stretches_share():

    from pipeline.stages.catalog import stack_catalogs

    def stretch(seeing_fwhm):
        table = QTable({"x": [1.0, 2.0]})
        table.meta.update(
            aperture_radii_fwhm=[1.0, 2.0, 3.0],
            detect_options={"aperture_radii": [1.0, 2.0, 3.0], "fwhm_guess": 3.0},
            flag_bits={"SATURATED": 1},
            seeing_fwhm=seeing_fwhm,
        )
        return table

    night, seeing = stack_catalogs(
        [stretch(2.70), stretch(2.72), stretch(2.71)], [Table({"stretch": [i]}) for i in range(3)]
    )
    assert len(night) == 6 and len(seeing) == 3
    # astropy's vstack joins list metadata (nine radii here): each is kept once
    assert night.meta["aperture_radii_fwhm"] == [1.0, 2.0, 3.0]
    assert night.meta["detect_options"] == {"aperture_radii": [1.0, 2.0, 3.0], "fwhm_guess": 3.0}
    assert night.meta["flag_bits"] == {"SATURATED": 1}
    assert "seeing_fwhm" not in night.meta  # per stretch: in the seeing table
    assert "merge_rule" in night.meta
