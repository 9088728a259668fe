"""Summaries of the demo night's products as the previous product layout wrote them.

Produced before the image products became one multi-extension file per unit,
at commit dd407386e83d ("Layout: the runner, the simulator and each stage
with helpers become subpackages ..."), with::

    zdrift run configs/demo.yaml --set night.output_dir=OLD --set run.workers=1

and, for every calibrate and rectify stretch, from its ``image.fits``,
``variance.fits`` and ``mask.fits`` (one plane per file then): the shape, the
number of NaN pixels, the float64 sums of the finite image and variance
pixels, the 1/50/99 % quantiles of the finite image pixels, and the number of
pixels carrying each mask bit; from the tables: sums of ``rows`` (bias,
time), ``smear_kernels`` (length, bow), ``block_index``, ``columns`` and
``column_stats`` columns; ``x_start`` is the old ``XSTART`` card of rectify.
Values are rounded to 10 significant digits.  ``tests/test_products.py``
compares the new products with them.
"""

VALUES = {
    "calibrate/s0000": {
        "shape": [1088, 1024],
        "n_nan": 29376,
        "image_sum": 66879607880.0,
        "variance_sum": 66941124880.0,
        "image_quantiles": [58794.93359, 61490.25586, 64282.25234],
        "bit_counts": {0: 26667, 1: 51343, 2: 29376, 3: 1088, 4: 30},
        "rows_bias_sum": 1090850.118,
        "rows_time_sum": 27137.74352,
    },
    "calibrate/s0001": {
        "shape": [1152, 1024],
        "n_nan": 31104,
        "image_sum": 65105203450.0,
        "variance_sum": 65166290300.0,
        "image_quantiles": [53127.28238, 56682.89844, 59730.64508],
        "bit_counts": {0: 29876, 1: 13555, 2: 31104, 3: 1152, 4: 26},
        "rows_bias_sum": 1156498.034,
        "rows_time_sum": 81179.46033,
    },
    "calibrate/s0002": {
        "shape": [1152, 1024],
        "n_nan": 31104,
        "image_sum": 57791373320.0,
        "variance_sum": 57850750270.0,
        "image_quantiles": [46121.40793, 49976.96484, 54255.91516],
        "bit_counts": {0: 32627, 1: 7604, 2: 31104, 3: 1152, 4: 27},
        "rows_bias_sum": 1158012.843,
        "rows_time_sum": 135317.5723,
    },
    "calibrate/s0003": {
        "shape": [1088, 1024],
        "n_nan": 29376,
        "image_sum": 48167947590.0,
        "variance_sum": 48225235960.0,
        "image_quantiles": [41280.28398, 43986.02344, 47197.27754],
        "bit_counts": {0: 29715, 1: 7328, 2: 29376, 3: 1088, 4: 29},
        "rows_bias_sum": 1094996.55,
        "rows_time_sum": 177331.6762,
    },
    "rectify/s0000": {
        "shape": [1035, 1024],
        "n_nan": 59302,
        "image_sum": 61755991390.0,
        "variance_sum": 52799184600.0,
        "image_quantiles": [59104.33492, 61638.90234, 64212.31859],
        "bit_counts": {0: 34729, 1: 81278, 2: 43008, 3: 4096, 4: 343, 5: 43008, 8: 16378},
        "kernel_length_sum": 248.1798294,
        "kernel_bow_sum": 461.0955462,
        "x_start": 0,
    },
    "rectify/s0001": {
        "shape": [1035, 1024],
        "n_nan": 57344,
        "image_sum": 56789022890.0,
        "variance_sum": 54680614080.0,
        "image_quantiles": [53546.57773, 56687.52539, 59417.69922],
        "bit_counts": {0: 36138, 1: 33324, 2: 43008, 3: 4096, 4: 280, 5: 43008, 8: 14336},
        "kernel_length_sum": 248.1798207,
        "kernel_bow_sum": 461.0953508,
        "x_start": 1024,
    },
    "rectify/s0002": {
        "shape": [1035, 1024],
        "n_nan": 57344,
        "image_sum": 50226577340.0,
        "variance_sum": 48782128890.0,
        "image_quantiles": [46487.43652, 49966.77539, 53747.43203],
        "bit_counts": {0: 39009, 1: 26392, 2: 43008, 3: 4096, 4: 316, 5: 43008, 8: 14336},
        "kernel_length_sum": 248.179812,
        "kernel_bow_sum": 461.0951487,
        "x_start": 2048,
    },
    "rectify/s0003": {
        "shape": [1035, 1024],
        "n_nan": 59302,
        "image_sum": 44103746710.0,
        "variance_sum": 38645795970.0,
        "image_quantiles": [41302.57031, 43828.41016, 46742.12891],
        "bit_counts": {0: 38045, 1: 26875, 2: 43008, 3: 4096, 4: 302, 5: 43008, 8: 16378},
        "kernel_length_sum": 248.179803,
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
        "flat": 1002.884008,
        "dark": 8392.020385,
        "noise_ratio": 1003.243322,
        "flags": 116,
    },
    "column_stats/s0000": {"level_sum": 305065920.0, "scatter_sum": 1748239.25},
    "column_stats/s0001": {"level_sum": 337990080.0, "scatter_sum": 2036523.0},
    "column_stats/s0002": {"level_sum": 298887616.0, "scatter_sum": 2026678.25},
    "column_stats/s0003": {"level_sum": 221519904.0, "scatter_sum": 1601059.0},
}
