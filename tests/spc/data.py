"""Published data sets reused by the tests of the statistical core.

Each constant names its source. The values were typed in from memory of the printed tables
(value from memory); each constant says how it was cross-checked.
"""

from __future__ import annotations

PISTON_RING_DIAMETERS: tuple[tuple[float, ...], ...] = (
    (74.030, 74.002, 74.019, 73.992, 74.008),
    (73.995, 73.992, 74.001, 74.011, 74.004),
    (73.988, 74.024, 74.021, 74.005, 74.002),
    (74.002, 73.996, 73.993, 74.015, 74.009),
    (73.992, 74.007, 74.015, 73.989, 74.014),
    (74.009, 73.994, 73.997, 73.985, 73.993),
    (73.995, 74.006, 73.994, 74.000, 74.005),
    (73.985, 74.003, 73.993, 74.015, 73.988),
    (74.008, 73.995, 74.009, 74.005, 74.004),
    (73.998, 74.000, 73.990, 74.007, 73.995),
    (73.994, 73.998, 73.994, 73.995, 73.990),
    (74.004, 74.000, 74.007, 74.000, 73.996),
    (73.983, 74.002, 73.998, 73.997, 74.012),
    (74.006, 73.967, 73.994, 74.000, 73.984),
    (74.012, 74.014, 73.998, 73.999, 74.007),
    (74.000, 73.984, 74.005, 73.998, 73.996),
    (73.994, 74.012, 73.986, 74.005, 74.007),
    (74.006, 74.010, 74.018, 74.003, 74.000),
    (73.984, 74.002, 74.003, 74.005, 73.997),
    (74.000, 74.010, 74.013, 74.020, 74.003),
    (73.982, 74.001, 74.015, 74.005, 73.996),
    (74.004, 73.999, 73.990, 74.006, 74.009),
    (74.010, 73.989, 73.990, 74.009, 74.014),
    (74.015, 74.008, 73.993, 74.000, 74.010),
    (73.982, 73.984, 73.995, 74.017, 74.013),
)
"""Inside diameters (mm) of forged piston rings, 25 subgroups of 5.

Source: Montgomery, *Introduction to Statistical Quality Control*, Table 6.3, used in his
Examples 6.1 (X-bar and R) and 6.3 (X-bar and S).

Sample 21 is (73.982, 74.001, 74.015, 74.005, 73.996). A copy that read
(73.988, 74.001, 74.009, 74.005, 73.996) gives the same mean but a range sum of 0.569 and an
S-bar of 0.0092; with the row as above the data reproduce the printed totals (range sum 0.581,
R-bar 0.023, S-bar 0.0094), and a web reprint of the book's Table 6.4 (the variable-size
version of these data) shows this sample 21. Samples 1-16 also match a web reprint of
Table 6.3, including its printed subgroup means and standard deviations.
"""
