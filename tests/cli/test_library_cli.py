"""`ramiform library build`: one command leaves a set the matcher can rank against."""

from __future__ import annotations

import numpy as np
import pytest

from service.cli import main
from service.errors import LibraryError
from service.library import load_reference_set
from service.match.cache import load_reference_table
from service.match.nuisance import n_styles
from service.match.persist import is_fresh


def test_build_command_grows_the_set_and_caches_the_matcher_features(tmp_path, capsys):
    out = tmp_path / "tiny"
    assert main(["library", "build", "--preset", "tiny", "--out", str(out), "--workers", "2"]) == 0
    printed = capsys.readouterr().out
    assert str(out) in printed and "features cached" in printed and "model stored" in printed
    refs = load_reference_set(out)
    table = load_reference_table(refs, build_if_missing=False)  # raises if the cache were missing
    # One row per drawing of a cluster: each is drawn in n_styles(size) styles (issue 10).
    counts = np.bincount(table.ensemble, minlength=len(refs.ensembles))
    assert counts.tolist() == [e.n_realisations * n_styles(e.n_particles) for e in refs.ensembles]
    assert np.isfinite(table.values).all()
    assert is_fresh(refs)  # the fitted model is stored: no process that ranks against the set refits it

    # `library refit` stores it again (after a change of the matcher's code)
    (out / "cache" / "match-model.npz").unlink()
    assert not is_fresh(load_reference_set(out))
    assert main(["library", "refit", str(out)]) == 0
    assert "model stored" in capsys.readouterr().out
    assert is_fresh(load_reference_set(out))
    assert main(["library", "refit", str(tmp_path / "absent")]) == 1


def test_skip_features_leaves_the_cache_unbuilt(tmp_path):

    out = tmp_path / "tiny"
    assert main(["library", "build", "--preset", "tiny", "--out", str(out), "--workers", "1", "--skip-features"]) == 0
    with pytest.raises(LibraryError, match="no matcher feature cache"):
        load_reference_table(load_reference_set(out), build_if_missing=False)
