"""The report's heat maps in blocks of values: the same contacts, summed per block (checked by hand-built
symmetric matrices with numpy)."""

import numpy as np

from aggpub.audit.report import _block_matrix


def _pairs(k):
    ia, ib = np.triu_indices(k)
    return ia, ib


def test_block_of_one_is_the_symmetric_matrix():
    k = 7
    ia, ib = _pairs(k)
    data = np.arange(1, len(ia) + 1, dtype=float)
    m, block = _block_matrix([str(i) for i in range(k)], ia, ib, data, side=10)
    full = np.zeros((k, k))
    full[ia, ib] = data
    full[ib, ia] = data
    assert block == 1
    np.testing.assert_array_equal(m, full)


def test_blocks_hold_the_contacts_between_value_groups():
    k, side = 23, 5  # blocks of ceil(23 / 5) = 5 values, 5 blocks (the last of 3 values)
    ia, ib = _pairs(k)
    rng = np.random.default_rng(3)
    data = rng.integers(0, 50, len(ia)).astype(float)
    m, block = _block_matrix([str(i) for i in range(k)], ia, ib, data, side=side)
    assert block == 5 and m.shape == (5, 5)
    np.testing.assert_array_equal(m, m.T)
    # contacts within block A (the diagonal) + between blocks (upper triangle) = every contact once
    assert np.triu(m).sum() == data.sum()
    ga, gb = ia // 5, ib // 5
    for x in range(5):
        for y in range(x, 5):
            sel = ((ga == x) & (gb == y)) | ((ga == y) & (gb == x))
            assert m[x, y] == data[sel].sum()


def test_svg_figures_are_well_formed_and_scaled():
    # Python's xml.etree parses every figure; points land inside the plot area; the heat map has one
    # rectangle per cell coloured by value (the largest value gets the scale's top colour)
    import xml.etree.ElementTree as ET

    from aggpub.audit import _svg as svg

    ns = "{http://www.w3.org/2000/svg}"
    chart = svg.line_chart([("a", [1, 10, 100], [1e-3, 1e-2, 1e-1], "#000000", ""),
                            ("b <&>", [1, 2, 3], [0.5, 0.0, 0.2], "#c0392b", "4,2")],
                           xlog=True, ylog=True, title="t", xlabel="x", ylabel="y")
    root = ET.fromstring(chart)
    lines = root.findall(f"{ns}polyline")
    assert len(lines) == 2
    pts = [tuple(map(float, p.split(","))) for p in lines[0].get("points").split()]
    # x = 1, 10, 100 on a log axis: equally spaced
    assert abs((pts[1][0] - pts[0][0]) - (pts[2][0] - pts[1][0])) < 0.2
    assert len(lines[1].get("points").split()) == 2  # y = 0 cannot be drawn on a log axis
    # the heat map's cells: one embedded k x k PNG, decoded by Pillow (the reference decoder), each pixel the
    # scale's colour of its cell (0 -> the scale's bottom colour, the largest value -> its top colour)
    import base64
    import io

    from PIL import Image

    m = np.array([[0.0, 1.0, 2.0], [1.0, 4.0, 0.0], [2.0, 0.0, 3.0]])
    root = ET.fromstring(svg.heatmap(m, ["p", "q", "r"], vmin=0.0, vmax=4.0, title="h"))
    (image,) = root.findall(f"{ns}image")
    href = image.get("href")
    assert href.startswith("data:image/png;base64,")
    pixels = np.asarray(Image.open(io.BytesIO(base64.b64decode(href.split(",", 1)[1]))).convert("RGB"))
    assert pixels.shape == (3, 3, 3)
    assert tuple(pixels[1, 1]) == (253, 231, 37) and tuple(pixels[0, 0]) == (68, 1, 84)
    assert tuple(pixels[0, 2]) == tuple(pixels[2, 0]) == (33, 145, 140)  # 2 of 4: the middle anchor
    ET.fromstring(svg.stacked_bar([("a", 0.3, "#111111"), ("b", 0.5, "#222222")], total=1.0, title="b"))
    ET.fromstring(svg.histogram(np.arange(50), bins=10, marker=20, marker_label="m", title="s"))


def test_report_figures_need_no_plotting_library():
    import subprocess
    import sys

    code = ("import sys; import numpy as np; from aggpub.audit.report import _plots; "
            "p = _plots({'_plot': {'true_pmf': np.array([0.1, 0.5, 0.4]), 'released_pmf': np.array([0.2, 0.4, 0.4]),"
            " 'sizes': np.array([20, 30, 40]), 'rel_errors': {'w': np.array([0.1, 0.2])}},"
            " 'grouping': {'min_size_policy': 20}}); print(sorted(p), 'matplotlib' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.strip() == "['degrees', 'errors', 'sizes'] False"


def test_ks_statistic_matches_scipy():
    # the audit's numpy two-sample KS statistic against scipy.stats.ks_2samp (the reference) on degree-like
    # integer samples with ties, different sizes and disjoint supports
    from scipy import stats

    from aggpub.audit.fidelity import ks_statistic

    rng = np.random.default_rng(5)
    cases = [(rng.poisson(5, 300), rng.poisson(6, 450)), (rng.integers(0, 3, 50), rng.integers(0, 3, 7)),
             (np.arange(10), np.arange(20, 25)), (rng.geometric(0.2, 1000), rng.geometric(0.2, 1000))]
    for x, y in cases:
        assert abs(ks_statistic(x, y) - float(stats.ks_2samp(x, y).statistic)) < 1e-12  # to rounding


def test_block_sums_are_numpy_add_at_sums_bit_for_bit():
    """Summed with bincount (cells in contact-matrix order) or in any other order: the very numbers of
    ``numpy.add.at`` on each triangle (fractional values, where the order of additions shows)."""
    rng = np.random.default_rng(8)
    for k, side in ((7, 10), (23, 5), (300, 40)):
        ia, ib = _pairs(k)
        data = rng.normal(10.0, 7.0, len(ia)) / 3.0
        for order in (np.arange(len(ia)), rng.permutation(len(ia))):
            a, b = ia[order], ib[order]
            if order[0] != 0:
                a, b = b, a  # some cells listed as (b, a): the other path
            m, block = _block_matrix([str(i) for i in range(k)], a, b, data[order], side=side)
            n = m.shape[0]
            ref = np.zeros((n, n))
            ba, bb = a // block, b // block
            np.add.at(ref, (ba, bb), data[order])
            off = ba != bb
            np.add.at(ref, (bb[off], ba[off]), data[order][off])
            assert np.array_equal(m, ref)


def test_block_matrices_of_several_tables_are_each_tables_own():
    """Several tables over the same cells in one call: each matrix is the one the table gives alone."""
    rng = np.random.default_rng(8)
    k = 37
    ia, ib = np.triu_indices(k)
    tables = [rng.random(len(ia)), rng.integers(0, 9, len(ia)).astype(float)]
    for side in (5, 40):
        both, block = _block_matrix([str(i) for i in range(k)], ia, ib, tables, side=side)
        for table, m in zip(tables, both):
            alone, block_alone = _block_matrix([str(i) for i in range(k)], ia, ib, table, side=side)
            assert block == block_alone and np.array_equal(m, alone)
    order = rng.permutation(len(ia))  # not in cell order: numpy's add.at path
    both, _ = _block_matrix([str(i) for i in range(k)], ib[order], ia[order], [t[order] for t in tables], side=5)
    for table, m in zip(tables, both):
        assert np.array_equal(m, _block_matrix([str(i) for i in range(k)], ib[order], ia[order], table[order],
                                               side=5)[0])


def test_error_figure_of_workloads_sharing_their_errors_is_the_figure_of_copies():
    """Workloads answered by the table's own cells share one array of relative errors; the figure computes
    its curve once and draws the same SVG as from separate copies of the array (and another curve for a
    workload of its own)."""
    from aggpub.audit.report import ECDF_POINTS, _error_figure

    rng = np.random.default_rng(5)
    shared = np.abs(rng.normal(size=3 * ECDF_POINTS))
    own = np.abs(rng.normal(size=50))
    drawn = _error_figure({"cells": shared, "contact_matrix:x": shared, "cuts": own})
    assert drawn == _error_figure({"cells": shared.copy(), "contact_matrix:x": shared.copy(), "cuts": own})
    assert drawn != _error_figure({"cells": shared, "contact_matrix:x": own, "cuts": own})
