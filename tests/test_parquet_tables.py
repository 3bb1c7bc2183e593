"""Parquet copies of images.csv / objects.csv: written beside the CSV, read back by the Python API as the same table."""

from __future__ import annotations

import os

import numpy as np
import pandas as pd
import pytest

from detdiff.analysis import tables as tables_module
from detdiff.analysis.suspects import SUSPECT_COLUMNS
from detdiff.analysis.tables import AnalysisTables, write_tables
from detdiff.api import open_run
from detdiff.data.coco import build_dataset

pytest.importorskip("pyarrow")


def _tables() -> tuple[AnalysisTables, object]:
    """Two images, three objects, with the values a CSV round trip gets wrong if read carelessly."""
    coco = {"images": [{"id": 5, "file_name": "a.jpg", "width": 64, "height": 48},
                       {"id": 9, "file_name": "NA.jpg", "width": 64, "height": 48}],
            "annotations": [{"id": k + 1, "image_id": 5 if k < 2 else 9, "category_id": 1 + k % 2,
                             "bbox": [1.0, 2.0, 10.0, 12.0], "area": 120.0, "iscrowd": 0} for k in range(3)],
            "categories": [{"id": 1, "name": "NA"}, {"id": 2, "name": "1"}]}
    ds = build_dataset(coco)
    images = pd.DataFrame({"image_id": [5, 9], "file_name": ["a.jpg", "NA.jpg"], "width": [64, 64],
                           "height": [48, 48], "usable": [True, False], "loc_score": [0.1234567891, np.nan],
                           "why": ["", "small;occluded"]})
    objects = pd.DataFrame({"annotation_id": [1, 2, 3], "image_id": [5, 5, 9], "category_name": ["NA", "1", "NA"],
                            "pos_score": [1 / 3, 2 / 3, np.nan], "never_learned": [False, True, False],
                            "probe": [True, False, False], "why": ["", "", "rare"],
                            "oof_other_category_id": pd.array([2, pd.NA, 1], dtype="Int64"),
                            "first_learned": pd.array([0, 3, 1], dtype="Int64")})
    suspects = pd.DataFrame({c: pd.Series(dtype="float64") for c in [*SUSPECT_COLUMNS, "image_index"]})
    empty = pd.DataFrame({"category_id": [1]})
    return AnalysisTables(images, objects, suspects, empty, empty), ds


def test_parquet_copy_reads_back_as_the_csv_table(tmp_path):
    tables, ds = _tables()
    written = write_tables(tables, tmp_path, ds)
    assert {"images_parquet", "objects_parquet"} <= set(written)
    assert not (tmp_path / "suspects.parquet").exists()          # small tables stay CSV only
    from_parquet = open_run(tmp_path)
    objects, images = from_parquet.objects, from_parquet.images
    assert objects["category_name"].tolist() == ["NA", "1", "NA"] and objects["why"].tolist() == ["", "", "rare"]
    assert objects["probe"].dtype == bool and images["usable"].tolist() == [True, False]
    assert images["loc_score"].iloc[0] == 0.123457                   # the CSV's 6 decimals
    # reference: pandas' CSV reader on the CSV itself (only empty cells missing)
    csv = pd.read_csv(tmp_path / "objects.csv", keep_default_na=False, na_values=[""])
    for column in ("annotation_id", "pos_score", "oof_other_category_id", "first_learned"):
        assert np.array_equal(objects[column].to_numpy(), csv[column].to_numpy(), equal_nan=True), column
        assert objects[column].dtype == csv[column].dtype, column    # Int64 with a gap -> float64, as the CSV
    for name in ("images", "objects"):                   # a CSV newer than its copy (edited by hand) wins
        stamp = (tmp_path / f"{name}.parquet").stat().st_mtime_ns + 10**9
        os.utime(tmp_path / f"{name}.csv", ns=(stamp, stamp))
    from_csv = open_run(tmp_path)
    pd.testing.assert_frame_equal(from_csv.objects, objects, check_exact=True)
    pd.testing.assert_frame_equal(from_csv.images, images, check_exact=True)
    some = ["annotation_id", "why"]
    pd.testing.assert_frame_equal(from_csv.table("objects", some), objects[some], check_exact=True)
    for name in ("images", "objects"):
        os.utime(tmp_path / f"{name}.csv", ns=(1, 1))                # the copy is the newer again
    pd.testing.assert_frame_equal(open_run(tmp_path).table("objects", some), objects[some], check_exact=True)
    with pytest.raises(ValueError, match="unknown table"):
        from_csv.table("object")


def test_without_pyarrow_a_stale_copy_is_removed(tmp_path, monkeypatch):
    tables, ds = _tables()
    write_tables(tables, tmp_path, ds)
    monkeypatch.setattr(tables_module, "parquet_available", lambda: False)
    tables.objects.loc[0, "pos_score"] = 0.5
    write_tables(tables, tmp_path, ds)
    assert not (tmp_path / "objects.parquet").exists() and not (tmp_path / "images.parquet").exists()
    assert open_run(tmp_path).objects["pos_score"].iloc[0] == 0.5
