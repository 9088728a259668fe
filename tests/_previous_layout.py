"""Summaries of the demo night's products as the previous product layout wrote them.

Produced before the image products became one multi-extension file per unit,
with the code and demo night of commit 8257681203d6 (the main line just
before the change; an export of it, run from its own folder), with::

    python -m pipeline run configs/demo_2026-10-15.yaml --set night.output_dir=OLD

and, for every calibrate and rectify stretch, from its ``image.fits``,
``variance.fits`` and ``mask.fits`` (one plane per file then): the shape, the
number of NaN pixels, the float64 sums of the finite image and variance
pixels, the 1/50/99 % quantiles of the finite image pixels, and the number of
pixels carrying each mask bit; from the tables: sums of ``rows`` (bias,
time), ``smear_kernels`` (length, bow), ``block_index``, ``columns`` and
``column_stats`` columns; ``x_start`` is the old ``XSTART`` card of rectify.
Values are rounded to 10 significant digits.  ``tests/test_products.py``
compares the new products with them.  They hold for this demo night only: if
demo_frames/ is regenerated, record them again the same way.

One change since, on purpose: the counts of bits 1 (BLEED) and 4
(COSMIC_RAY) are calibrate 7's, where a bleed trail ends above its row's
sky instead of above the bias (the twilight sky of stretch s0000 had
continued every trail to the end of its column: BLEED 51,343 -> 7,038
calibrated pixels; 4 more cosmic-ray pixels found where the trails no
longer hid them); recorded from this code's products of the same night.
Every other value is the old layout's.
"""

VALUES = {
    "calibrate/s0000": {
        "shape": [1088, 1024],
        "n_nan": 29376,
        "image_sum": 66879605770.0,
        "variance_sum": 66941119320.0,
        "image_quantiles": [58794.98887, 61490.23633, 64282.26523],
        "bit_counts": {0: 26667, 1: 7038, 2: 29376, 3: 1088, 4: 34},
        "rows_bias_sum": 1090850.118,
        "rows_time_sum": 27137.74352,
    },
    "calibrate/s0001": {
        "shape": [1152, 1024],
        "n_nan": 31104,
        "image_sum": 65105202630.0,
        "variance_sum": 65166286030.0,
        "image_quantiles": [53127.2634, 56682.94141, 59730.62109],
        "bit_counts": {0: 29876, 1: 7453, 2: 31104, 3: 1152, 4: 26},
        "rows_bias_sum": 1156498.034,
        "rows_time_sum": 81179.46033,
    },
    "calibrate/s0002": {
        "shape": [1152, 1024],
        "n_nan": 31104,
        "image_sum": 57791373290.0,
        "variance_sum": 57850747900.0,
        "image_quantiles": [46121.40793, 49976.96875, 54255.88219],
        "bit_counts": {0: 32627, 1: 7520, 2: 31104, 3: 1152, 4: 27},
        "rows_bias_sum": 1158012.843,
        "rows_time_sum": 135317.5723,
    },
    "calibrate/s0003": {
        "shape": [1088, 1024],
        "n_nan": 29376,
        "image_sum": 48167948680.0,
        "variance_sum": 48225235870.0,
        "image_quantiles": [41280.28008, 43986.02148, 47197.28281],
        "bit_counts": {0: 29715, 1: 7269, 2: 29376, 3: 1088, 4: 29},
        "rows_bias_sum": 1094996.55,
        "rows_time_sum": 177331.6762,
    },
    "rectify/s0000": {
        "shape": [1035, 1024],
        "n_nan": 59302,
        "image_sum": 61755992870.0,
        "variance_sum": 52799193470.0,
        "image_quantiles": [59104.30613, 61638.94141, 64212.36328],
        "bit_counts": {0: 34729, 1: 26130, 2: 43008, 3: 4096, 4: 382, 5: 43008, 8: 16378},
        "kernel_length_sum": 248.1798294,
        "kernel_bow_sum": 461.0955462,
        "x_start": 0,
    },
    "rectify/s0001": {
        "shape": [1035, 1024],
        "n_nan": 57344,
        "image_sum": 56789023860.0,
        "variance_sum": 54680623350.0,
        "image_quantiles": [53546.60156, 56687.54883, 59417.69199],
        "bit_counts": {0: 36138, 1: 26047, 2: 43008, 3: 4096, 4: 280, 5: 43008, 8: 14336},
        "kernel_length_sum": 248.1798208,
        "kernel_bow_sum": 461.0953508,
        "x_start": 1024,
    },
    "rectify/s0002": {
        "shape": [1035, 1024],
        "n_nan": 57344,
        "image_sum": 50226577620.0,
        "variance_sum": 48782137130.0,
        "image_quantiles": [46487.43691, 49966.76758, 53747.42207],
        "bit_counts": {0: 39009, 1: 26285, 2: 43008, 3: 4096, 4: 316, 5: 43008, 8: 14336},
        "kernel_length_sum": 248.179812,
        "kernel_bow_sum": 461.0951487,
        "x_start": 2048,
    },
    "rectify/s0003": {
        "shape": [1035, 1024],
        "n_nan": 59302,
        "image_sum": 44103746810.0,
        "variance_sum": 38645803500.0,
        "image_quantiles": [41302.5625, 43828.42969, 46742.13527],
        "bit_counts": {0: 38045, 1: 26801, 2: 43008, 3: 4096, 4: 302, 5: 43008, 8: 16378},
        "kernel_length_sum": 248.1798031,
        "kernel_bow_sum": 461.0949213,
        "x_start": 3072,
    },
    "ingest/block_index": {
        "row_start": 6144.0,
        "n_rows": 4096.0,
        "gain": 8.0,
        "read_noise": 20.0,
        "saturation": 239200.0,
        "t_start": 281.966,
    },
    "columns/columns": {
        "flat": 1002.884019,
        "dark": 8391.465828,
        "noise_ratio": 1003.242771,
        "flags": 116,
    },
    "column_stats/s0000": {"level_sum": 305065920.0, "scatter_sum": 1748229.0},
    "column_stats/s0001": {"level_sum": 337990080.0, "scatter_sum": 2036523.0},
    "column_stats/s0002": {"level_sum": 298887616.0, "scatter_sum": 2026678.25},
    "column_stats/s0003": {"level_sum": 221519936.0, "scatter_sum": 1601059.25},
}
