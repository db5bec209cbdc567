"""Bins of multipoles (cmbtools.spectrum.Binning)."""

from __future__ import annotations

import pickle

import numpy as np
import pytest

from cmbtools.exceptions import InvalidInputError
from cmbtools.spectrum import Binning


def test_uniform_bins_cover_the_range():
    b = Binning.uniform(lmin=2, lmax=383, width=16)
    assert b.n_bins == 24
    assert b.ell_min[0] == 2 and b.ell_max[-1] == 383
    np.testing.assert_array_equal(b.ell_min[1:], b.ell_max[:-1] + 1)  # contiguous
    np.testing.assert_array_equal(b.n_ell[:-1], 16)
    assert b.n_ell[-1] == 14
    np.testing.assert_allclose(b.ell_eff, 0.5 * (b.ell_min + b.ell_max))


def test_uniform_merges_a_short_last_bin():
    b = Binning.uniform(lmin=2, lmax=37, width=16)  # 2-17, 18-33, and 34-37 (4 < 8) merged
    assert b.ell_min.tolist() == [2, 18]
    assert b.ell_max.tolist() == [17, 37]


def test_from_edges_and_log_spaced():
    b = Binning.from_edges([2, 10, 30, 61])
    assert b.ell_min.tolist() == [2, 10, 30]
    assert b.ell_max.tolist() == [9, 29, 60]
    lb = Binning.log_spaced(2, 500, 12)
    assert lb.ell_min[0] == 2 and lb.ell_max[-1] == 500
    ratios = (lb.ell_max + 1) / lb.ell_min
    assert np.all(lb.n_ell >= 1) and lb.n_bins <= 12
    # evenly spaced in log(ell): the edge ratio is (501/2)^(1/12) ~ 1.58 away from the lowest bins
    np.testing.assert_allclose(ratios[-4:], (501 / 2) ** (1 / 12), rtol=0.05)


def test_averaging_and_model_matrices():
    for weighting in ("dl", "cl"):
        b = Binning.from_edges([2, 5, 11, 20], weighting=weighting)
        p = b.averaging_matrix(25)
        q = b.model_matrix(25)
        assert p.shape == (3, 26) and q.shape == (26, 3)
        np.testing.assert_allclose(p @ q, np.eye(3), rtol=1e-14, atol=1e-15)
        np.testing.assert_array_equal(p.sum(axis=0), b.averaging_weights(25))
        np.testing.assert_array_equal(q.sum(axis=1), b.model_weights(25))
        # outside the bins too, at any lmax: D_l = l(l+1) C_l / 2 pi (common practice), C_l = 1 per unit "cl"
        ell = np.arange(31)
        unit = b.unit_bandpower_cl(30)
        expected = np.where(ell > 0, 2 * np.pi / np.maximum(ell * (ell + 1.0), 1.0), 0.0) if weighting == "dl" else 1.0
        np.testing.assert_allclose(unit, np.broadcast_to(expected, (31,)), rtol=1e-15)
        assert b.unit_bandpower_cl(3).size == 4  # below the bins' last multipole as well


def test_bin_spectrum_of_flat_dl_is_exact():
    # A spectrum flat in D_l = l(l+1)C_l/2pi (common practice) is reproduced exactly by 'dl' bins.
    b = Binning.uniform(2, 100, 10)
    ell = np.arange(101)
    cl = np.zeros(101)
    cl[1:] = 2 * np.pi * 3.0e-10 / (ell[1:] * (ell[1:] + 1))
    np.testing.assert_allclose(b.bin_spectrum(cl) * b.dl_factor, 3.0e-10, rtol=1e-13)
    bc = Binning.uniform(2, 100, 10, weighting="cl")
    np.testing.assert_allclose(bc.bin_spectrum(np.full(101, 5.0)), 5.0, rtol=1e-14)


def test_bins_with_gaps_are_allowed():
    b = Binning([2, 20], [10, 30])
    assert b.bin_index[15] == -1 and b.bin_index[25] == 1
    assert b.averaging_matrix()[:, 11:20].sum() == 0


@pytest.mark.parametrize(
    "args, match",
    [
        (([2, 10], [12, 20]), "overlap"),
        (([5], [4]), "empty"),
        (([-1], [4]), ">= 0"),
        (([2, 3], [5]), "same length"),
        (([2.5], [4]), "whole numbers"),
    ],
)
def test_invalid_bins_raise(args, match):
    with pytest.raises(InvalidInputError, match=match):
        Binning(*args)


def test_invalid_constructors_raise():
    with pytest.raises(InvalidInputError, match="strictly increasing"):
        Binning.from_edges([2, 10, 10])
    with pytest.raises(InvalidInputError, match="weighting"):
        Binning([2], [5], "flat")
    with pytest.raises(InvalidInputError, match="only ell=0"):
        Binning([0, 1], [0, 5], "dl")
    with pytest.raises(InvalidInputError, match="width"):
        Binning.uniform(2, 10, 0)
    with pytest.raises(InvalidInputError, match="lmax"):
        Binning.uniform(2, None, 4)


def test_value_semantics_and_immutability():
    a = Binning.uniform(2, 50, 8)
    b = Binning.uniform(2, 50, 8)
    assert a == b and hash(a) == hash(b)
    assert a != Binning.uniform(2, 50, 8, weighting="cl")
    with pytest.raises(ValueError):
        a.ell_min[0] = 3  # read-only array
    with pytest.raises(AttributeError):
        a.weighting = "cl"
    assert pickle.loads(pickle.dumps(a)) == a


def test_bin_edges_are_read_from_a_text_file(tmp_path):
    from cmbtools.exceptions import InputFileError
    from cmbtools.spectrum.binning import read_bin_edges

    path = tmp_path / "edges.txt"
    path.write_bytes("\ufeff# bin edges of the Tern field\n2 10, 20\n\n30,45  # last\n".encode("utf-8"))
    edges = read_bin_edges(path)
    np.testing.assert_array_equal(edges, [2.0, 10.0, 20.0, 30.0, 45.0])
    b = Binning.from_edges(edges)
    np.testing.assert_array_equal(b.ell_min, [2, 10, 20, 30])
    bad = tmp_path / "bad.txt"
    bad.write_text("2 10\n20 twenty\n")
    with pytest.raises(InputFileError, match="line 2: 'twenty' is not a number"):
        read_bin_edges(bad)
