"""`ramiform analyze`: JSON Lines in input order, the stable keys, per-image errors."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from service.cli import main


def _tree_image(path: Path, *, depth: int, size_px: int = 420) -> None:
    """A binary tree of thick dark strokes on a pale background, saved as PNG."""
    from skimage.draw import line

    img = np.full((size_px, size_px), 225, np.uint8)
    mask = np.zeros_like(img, bool)

    def branch(r, c, angle, length, level):
        r2 = r - length * np.cos(angle)
        c2 = c + length * np.sin(angle)
        rr, cc = line(int(r), int(c), int(r2), int(c2))
        mask[rr.clip(0, size_px - 1), cc.clip(0, size_px - 1)] = True
        if level < depth:
            branch(r2, c2, angle - 0.45, length * 0.7, level + 1)
            branch(r2, c2, angle + 0.45, length * 0.7, level + 1)

    branch(size_px * 0.92, size_px / 2, 0.0, size_px * 0.28, 1)
    from scipy import ndimage

    thick = ndimage.binary_dilation(mask, iterations=2)
    img[thick] = 40
    Image.fromarray(img).save(path)


@pytest.fixture(scope="module")
def images(tmp_path_factory) -> list[Path]:
    folder = tmp_path_factory.mktemp("cli")
    first, second = folder / "tree_a.png", folder / "tree_b.png"
    _tree_image(first, depth=5)
    _tree_image(second, depth=6)
    bad = folder / "notes.png"
    bad.write_text("this is a text file with an image name")
    return [first, bad, second]


def test_json_lines_keep_input_order_and_report_bad_files(images, capsys):
    status = main(["analyze", *map(str, images), "--json", "--workers", "2"])
    lines = capsys.readouterr().out.strip().splitlines()
    assert status == 1  # one image failed
    assert len(lines) == 3
    records = [json.loads(line) for line in lines]
    assert [r["path"] for r in records] == [str(p) for p in images]
    assert records[1]["error"]["type"] == "UnsupportedFormatError"
    for record in (records[0], records[2]):
        f = record["features"]
        low, high = f["box_dimension"]["ci95"]
        assert low <= f["box_dimension"]["value"] <= high
        assert isinstance(f["mass_radius_dimension"]["value"], float)
        assert len(f["lacunarity"]["scales_px"]) == len(f["lacunarity"]["values"]) > 0
        for key in ("tips", "junctions", "branches"):
            assert isinstance(f["skeleton"][key], int)
        assert isinstance(record["warnings"], list)
        assert any(w["code"] == "not_calibrated" and "not calibrated" in w["text"] for w in record["warnings"])
    # A deeper tree has more tips: a binary tree of depth k has 2**(k-1) leaves plus its root end.
    assert records[2]["features"]["skeleton"]["tips"] > records[0]["features"]["skeleton"]["tips"]


def test_pixel_size_gives_lengths_in_mm(images, capsys):
    main(["analyze", str(images[0]), "--json", "--pixel-size", "0.05"])
    record = json.loads(capsys.readouterr().out)
    assert record["calibration"] == {"pixel_size_mm": 0.05, "source": "user", "calibrated": True}
    assert not any(w["code"] == "not_calibrated" for w in record["warnings"])


def test_table_output_names_each_image(images):
    out = subprocess.run(
        [sys.executable, "-m", "service.cli", "analyze", *map(str, images), "--workers", "1"],
        capture_output=True, text=True, check=False,
    )
    assert out.returncode == 1
    rows = out.stdout.splitlines()
    assert rows[0].startswith("image")
    body = [r for r in rows[1:] if not r.startswith("    ")]
    assert [r.split()[0] for r in body] == [p.name for p in images]
    assert "error" in body[1]


def test_a_dask_cluster_gives_the_same_lines_in_the_same_order(images, capsys):
    from distributed import LocalCluster

    main(["analyze", *map(str, images), "--json", "--workers", "1"])
    local = [json.loads(line) for line in capsys.readouterr().out.splitlines()]
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None) as cluster:
        status = main(["analyze", *map(str, images), "--json", "--scheduler", cluster.scheduler_address])
    remote = [json.loads(line) for line in capsys.readouterr().out.splitlines()]
    assert status == 1
    assert [r["path"] for r in remote] == [str(p) for p in images]
    assert remote[1]["error"] == local[1]["error"]
    # Same seeds and same code on the workers: the same numbers, up to the last bits of
    # floating-point sums whose order depends on the process's thread settings.
    for r, l in ((remote[0], local[0]), (remote[2], local[2])):
        fr, fl = r["features"], l["features"]
        assert fr["box_dimension"]["value"] == pytest.approx(fl["box_dimension"]["value"], rel=1e-9)
        assert fr["box_dimension"]["ci95"] == pytest.approx(fl["box_dimension"]["ci95"], rel=1e-9)
        assert fr["mass_radius_dimension"]["value"] == pytest.approx(fl["mass_radius_dimension"]["value"], rel=1e-9)
        assert fr["lacunarity"]["values"] == pytest.approx(fl["lacunarity"]["values"], rel=1e-9)
        assert fr["skeleton"] == fl["skeleton"]
        assert [m["regime"] for m in r["matches"]] == [m["regime"] for m in l["matches"]]


def test_region_and_exclusion_boxes_reach_the_segmentation(images, capsys):
    from service.analysis import analyze

    path = images[0]
    for roi_flag, roi in (("210,230,190", (210.0, 230.0, 190.0)),
                          ("210,230,200,170,-15", (210.0, 230.0, 200.0, 170.0, -15.0))):
        status = main(["analyze", str(path), "--json", "--workers", "1", "--roi", roi_flag,
                       "--exclude", "0,0,60,40", "--exclude", "350.5,0,420,30"])
        assert status == 0
        record = json.loads(capsys.readouterr().out)
        # The same file through the pipeline with the same choices (boxes as whole pixels, outward).
        direct = analyze(path, roi=roi, exclude=((0, 0, 60, 40), (350, 0, 420, 30)), match=False).to_dict()
        assert record["segmentation"] == direct["segmentation"], roi_flag
        assert record["features"] == direct["features"], roi_flag


@pytest.mark.parametrize(("flags", "reason"), [
    (["--roi", "1,2"], "CX,CY,R"),
    (["--roi", "1,2,3,4"], "CX,CY,R"),
    (["--roi", "a,b,c"], "CX,CY,R"),
    (["--roi", "10,10,-5"], "radii must be positive"),
    (["--roi", "10,10,5,0,30"], "radii must be positive"),
    (["--roi", "10,10,nan"], "CX,CY,R"),
    (["--exclude", "0,0,10"], "X0,Y0,X1,Y1"),
    (["--exclude", "10,0,5,10"], "X1 > X0"),
    (["--threshold", "3"], "between 0 and 1"),
    (["--polarity", "purple"], "invalid choice"),
])
def test_bad_overrides_are_argparse_errors_that_say_what_was_expected(images, capsys, flags, reason):
    with pytest.raises(SystemExit) as stop:
        main(["analyze", str(images[0]), *flags])
    assert stop.value.code == 2  # argparse's usage error
    err = capsys.readouterr().err
    assert reason in err and flags[0] in err, err
