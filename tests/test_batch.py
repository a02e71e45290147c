"""Whole-catalogue runs on Dask (service/batch.py).

The reference for every result here is the core itself: the batch path must give, for each
row, exactly (bitwise) what one call of the core's function on the whole catalogue gives.
The catalogue is synthetic (seeded), with catalogue-style column names that differ from the
canonical ones, so the column mapping is exercised on every run.
"""

from __future__ import annotations

import csv
import io
import json
import pathlib
import random
import re

import numpy as np
import pytest

pd = pytest.importorskip("pandas")
pa = pytest.importorskip("pyarrow")
pq = pytest.importorskip("pyarrow.parquet")
pytest.importorskip("dask.dataframe")

from service import batch  # noqa: E402
from service.batch import engine  # noqa: E402
from service.core import propagation as core  # noqa: E402

#: Rows of the large synthetic catalogue: 2 million (not more) with seven columns, to keep
#: the module well under a minute of CPU on a 2-core machine.
LARGE_ROWS = 2_000_000
#: Rows per Parquet row group (and so per Dask partition with the default block size).
ROW_GROUP_ROWS = 250_000

CATALOGUE_EPOCH = 2016.0
TARGET_EPOCH = 2031.5

#: Canonical field -> column name in the synthetic catalogue.
MAPPING = {
    "ra_deg": "RA_ICRS",
    "dec_deg": "DE_ICRS",
    "parallax_mas": "Plx",
    "pm_ra_cosdec_mas_yr": "pmRA",
    "pm_dec_mas_yr": "pmDE",
    "radial_velocity_km_s": "RV",
}

OUT_FLOATS = [c.name for c in batch.PROPAGATE.outputs if c.dtype == "float64"]


def synthetic_catalogue(n: int, seed: int) -> pd.DataFrame:
    """Stars spread uniformly on the sky with catalogue-like astrometry.

    Parallaxes include non-positive values, 70 % of radial velocities are unknown, a few
    proper motions are implausibly large (all common in real catalogues), and a handful of
    rows are bad: NaN or out of range in a required field.
    """
    rng = np.random.default_rng(seed)
    ra = rng.uniform(0.0, 360.0, n)
    dec = np.degrees(np.arcsin(rng.uniform(-1.0, 1.0, n)))
    plx = rng.exponential(2.0, n) - 0.2
    plx[rng.random(n) < 0.05] = np.nan
    pma = rng.normal(0.0, 30.0, n)
    pmd = rng.normal(0.0, 30.0, n)
    pma[rng.random(n) < 1e-4] = 20_000.0
    rv = np.where(rng.random(n) < 0.7, np.nan, rng.normal(0.0, 40.0, n))
    bad = rng.choice(n, size=40, replace=False)
    ra[bad[:10]] = np.nan
    pmd[bad[10:20]] = np.nan
    dec[bad[20:30]] = 95.0
    ra[bad[30:40]] = -1.0
    return pd.DataFrame(
        {
            "source_id": np.arange(n, dtype=np.int64) * 7 + 3,
            "RA_ICRS": ra,
            "DE_ICRS": dec,
            "Plx": plx,
            "pmRA": pma,
            "pmDE": pmd,
            "RV": rv,
        }
    )


def write_parquet(frame: pd.DataFrame, path, row_group_rows: int = ROW_GROUP_ROWS) -> None:
    pq.write_table(
        pa.Table.from_pandas(frame, preserve_index=False), path, row_group_size=row_group_rows
    )


def read_output(path) -> pd.DataFrame:
    frame = pq.read_table(path).to_pandas()
    return frame.sort_values("source_id", kind="stable").reset_index(drop=True)


def run(source, dest, **kw):
    kw.setdefault("columns", MAPPING)
    kw.setdefault("keep", ["source_id"])
    kw.setdefault(
        "params", {"catalogue_epoch_jyear": CATALOGUE_EPOCH, "target_epoch_jyear": TARGET_EPOCH}
    )
    return batch.run_batch("propagate", source, dest, **kw)


def bad_row_mask(cat: pd.DataFrame) -> np.ndarray:
    """Rows the batch path must refuse, by the fields' documented ranges."""
    ra, dec = cat["RA_ICRS"].to_numpy(), cat["DE_ICRS"].to_numpy()
    with np.errstate(invalid="ignore"):
        return (
            np.isnan(ra)
            | np.isnan(cat["pmDE"].to_numpy())
            | (np.abs(dec) > 90.0)
            | (ra < 0.0)
            | (ra > 360.0)
        )


def assert_bitwise_equal(a, b, what):
    a = np.ascontiguousarray(a)
    b = np.ascontiguousarray(b)
    assert a.dtype == b.dtype or (a.dtype.kind in "iu" and b.dtype.kind in "iu"), what
    if a.dtype.kind == "f":
        # Bit patterns, so that even the sign of zero must agree. NaN (unknown) is written
        # to Parquet as null and read back as the one standard NaN, so for NaN only the
        # position must agree (not the sign bit the arithmetic happened to leave).
        nan_a, nan_b = np.isnan(a), np.isnan(b)
        same = (a.view(np.uint64) == b.view(np.uint64)) | (nan_a & nan_b)
    else:
        same = a.astype(np.int64) == b.astype(np.int64)
    assert same.all(), f"{what}: {np.count_nonzero(~same)} rows differ"


@pytest.fixture(scope="module")
def large(tmp_path_factory):
    """The large catalogue on disk, and its output from a default (local) run."""
    root = tmp_path_factory.mktemp("large")
    cat = synthetic_catalogue(LARGE_ROWS, seed=20261202)
    write_parquet(cat, root / "catalogue.parquet")
    summary = run(root / "catalogue.parquet", root / "out")
    return cat, root, summary


@pytest.mark.slow
def test_dask_equals_core_bitwise_on_two_million_rows(large):
    cat, root, summary = large
    out = read_output(root / "out")
    assert len(out) == LARGE_ROWS == summary.rows
    assert summary.metadata["input"]["partitions"] >= 2  # really partitioned
    assert np.array_equal(out["source_id"].to_numpy(), cat["source_id"].to_numpy())
    bad = bad_row_mask(cat)
    good = ~bad
    # The reference: one call of the core on the whole catalogue, as a user would make it.
    with np.errstate(invalid="ignore"):
        ref = core.propagate(
            *(cat[MAPPING[name]].to_numpy() for name in MAPPING),
            CATALOGUE_EPOCH,
            TARGET_EPOCH,
        )
    for name in OUT_FLOATS:
        assert_bitwise_equal(out[name].to_numpy()[good], getattr(ref.astrometry, name)[good], name)
    assert_bitwise_equal(
        out["propagation_flags"].to_numpy()[good], ref.flags[good], "propagation_flags"
    )
    assert out["propagation_flags"].dtype == np.uint32
    # Every flag the core can raise on these inputs was raised somewhere (the comparison
    # above is not vacuous for the flags).
    seen = np.bitwise_or.reduce(out["propagation_flags"].to_numpy())
    for flag in (
        core.PropagationFlag.PARALLAX_MISSING,
        core.PropagationFlag.PARALLAX_NOT_POSITIVE,
        core.PropagationFlag.RADIAL_VELOCITY_MISSING,
        core.PropagationFlag.PROPER_MOTION_IMPLAUSIBLE,
        core.PropagationFlag.RADIAL_VELOCITY_UNCHANGED,
    ):
        assert seen & int(flag), flag
    # The bad rows: flagged, not computed.
    assert np.all(out["row_flags"].to_numpy()[bad] != 0)
    assert np.all(out["row_flags"].to_numpy()[good] == 0)
    assert np.all(np.isnan(out.loc[bad, OUT_FLOATS].to_numpy()))
    assert np.all(out["propagation_flags"].to_numpy()[bad] == 0)
    counts = summary.flag_counts
    assert counts["row_flags"]["required_value_missing"] == 20
    assert counts["row_flags"]["value_out_of_range"] == 20
    n_rv_missing = np.count_nonzero(np.isnan(cat["RV"].to_numpy()[good]))
    assert counts["propagation_flags"]["radial_velocity_missing"] == n_rv_missing


@pytest.mark.slow
def test_metadata_records_inputs_and_versions(large):
    _, root, _ = large
    meta = batch.read_metadata(root / "out")
    assert meta["job"] == "propagate"
    assert meta["parameters"]["model"] == "standard"
    assert meta["parameters"]["catalogue_epoch"]["julian_epoch_tdb"] == CATALOGUE_EPOCH
    assert meta["parameters"]["target_epoch"]["julian_epoch_tdb"] == TARGET_EPOCH
    # J2031.5 is 31.5 x 365.25 = 11505.375 days after J2000.0 = 2000-01-01T12:00 TT (IAU
    # 1976 definition of the Julian epoch): 2031-07-02T21:00 TDB. UTC is earlier by
    # TT-UTC = 69.184 s (37 leap seconds + 32.184 s; IERS Bulletin C, no leap second
    # announced since 2017) and by TDB-TT (below 2 ms): 2031-07-02T20:58:50.816 UTC.
    assert meta["parameters"]["target_epoch"]["iso_utc"].startswith("2031-07-02T20:58:50.8")
    assert meta["parameters"]["frames"] == {"input": "ICRS", "output": "ICRS"}
    assert meta["input"]["column_mapping"] == MAPPING
    assert set(meta["input"]["columns_read"]) == {"source_id", *MAPPING.values()}
    for dist in ("numpy", "pyerfa", "astropy", "astropy-iers-data", "dask", "pyarrow"):
        assert meta["versions"][dist], dist
    assert meta["versions"]["skydrift"]
    bits = meta["flags"]["propagation_flags"]
    assert bits[str(int(core.PropagationFlag.AT_POLE))]["name"] == "at_pole"
    assert meta["output"]["rows"] == LARGE_ROWS
    assert meta["flag_counts"]["row_flags"]["value_out_of_range"] == 20


def test_local_cluster_with_two_workers_matches_local_scheduler(tmp_path):
    distributed = pytest.importorskip("distributed")
    cat = synthetic_catalogue(300_000, seed=7)
    write_parquet(cat, tmp_path / "cat.parquet", row_group_rows=50_000)
    local = run(tmp_path / "cat.parquet", tmp_path / "local", blocksize="4MiB")
    assert local.metadata["input"]["partitions"] >= 4
    with (
        distributed.LocalCluster(
            n_workers=2, threads_per_worker=1, processes=False, dashboard_address=None
        ) as cluster,
        distributed.Client(cluster) as client,
    ):
        remote = run(
            tmp_path / "cat.parquet", tmp_path / "cluster", client=client, blocksize="4MiB"
        )
        assert remote.metadata["execution"]["workers"] == 2
        # The scheduler address works as well as a client object.
        by_address = run(
            tmp_path / "cat.parquet",
            tmp_path / "by_address",
            scheduler=cluster.scheduler_address,
            blocksize="4MiB",
        )
    a = read_output(tmp_path / "local")
    for other in ("cluster", "by_address"):
        b = read_output(tmp_path / other)
        assert list(a.columns) == list(b.columns)
        for name in a.columns:
            assert_bitwise_equal(a[name].to_numpy(), b[name].to_numpy(), f"{other}: {name}")
    assert remote.flag_counts == local.flag_counts == by_address.flag_counts
    assert remote.metadata["execution"]["scheduler"] == "dask.distributed"
    assert by_address.metadata["execution"]["worker_versions"]


def test_bad_rows_and_missing_optional_columns_are_flagged_per_row(tmp_path):
    frame = pd.DataFrame(
        {
            "source_id": [1, 2, 3, 4, 5, 6, 7],
            "ra_deg": [10.0, np.nan, 10.0, 10.0, 400.0, 10.0, 10.0],
            "dec_deg": [20.0, 20.0, -91.0, 20.0, 20.0, 20.0, 20.0],
            "parallax_mas": [5.0, 5.0, 5.0, np.inf, 5.0, np.nan, -1.0],
            "pm_ra_cosdec_mas_yr": [1.0, 1.0, 1.0, 1.0, 1.0, 1.0, np.nan],
            "pm_dec_mas_yr": [1.0] * 7,
        }
    )  # no radial_velocity_km_s column at all
    write_parquet(frame, tmp_path / "cat.parquet")
    summary = batch.run_batch(
        "propagate",
        tmp_path / "cat.parquet",
        tmp_path / "out",
        params={"catalogue_epoch_jyear": 2016.0, "target_epoch_jyear": 2000.0},
        keep=["source_id"],
    )
    out = read_output(tmp_path / "out")
    names = [list(n) for n in batch.flag_names(out["row_flags"], "row_flags", "propagate")]
    assert names == [
        [],
        ["required_value_missing"],
        ["value_out_of_range"],
        ["value_out_of_range"],
        ["value_out_of_range"],
        [],
        ["required_value_missing"],
    ]
    prop = [
        list(n)
        for n in batch.flag_names(out["propagation_flags"], "propagation_flags", "propagate")
    ]
    # Absent radial velocity column: unknown for every computed row, and said so.
    assert prop[0] == ["radial_velocity_missing"]
    assert prop[5] == ["parallax_missing", "radial_velocity_missing"]
    assert all(p == [] for p in (prop[1], prop[2], prop[3], prop[4], prop[6]))
    assert np.isnan(out.loc[[1, 2, 3, 4, 6], OUT_FLOATS].to_numpy()).all()
    assert np.isfinite(out.loc[0, OUT_FLOATS].to_numpy(dtype=float)[:5]).all()
    assert summary.metadata["input"]["absent_optional_fields"] == ["radial_velocity_km_s"]


def test_missing_required_column_fails_before_any_work(tmp_path, monkeypatch):
    frame = synthetic_catalogue(1000, seed=1).drop(columns=["pmDE"])
    write_parquet(frame, tmp_path / "cat.parquet")

    def never(*args, **kwargs):  # pragma: no cover - failing the test is the point
        raise AssertionError("a partition was processed")

    monkeypatch.setattr(engine, "process_partition", never)
    with pytest.raises(batch.BatchInputError, match=r"'pmDE'.*pm_dec_mas_yr"):
        run(tmp_path / "cat.parquet", tmp_path / "out")
    assert not (tmp_path / "out").exists()
    # Unmapped and absent under its canonical name: the message names the canonical name.
    with pytest.raises(batch.BatchInputError, match=r"'pm_dec_mas_yr'.*--columns"):
        run(
            tmp_path / "cat.parquet",
            tmp_path / "out",
            columns={k: v for k, v in MAPPING.items() if k != "pm_dec_mas_yr"},
        )
    # A mapped optional column that is not there is a mistake too, not "unknown".
    write_parquet(synthetic_catalogue(1000, seed=1), tmp_path / "full.parquet")
    with pytest.raises(batch.BatchInputError, match=r"'RVel'"):
        run(
            tmp_path / "full.parquet",
            tmp_path / "out",
            columns={**MAPPING, "radial_velocity_km_s": "RVel"},
        )
    assert not (tmp_path / "out").exists()


def test_command_line_run_and_clear_failure(tmp_path, capsys):
    from service.cli import main

    cat = synthetic_catalogue(5000, seed=3)
    cat.to_csv(tmp_path / "cat.csv", index=False)
    write_parquet(cat, tmp_path / "cat.parquet")
    mapping = ",".join(f"{k}={v}" for k, v in MAPPING.items())
    common = ["--catalogue-epoch", "J2016.0", "--target-epoch", "J2031.5", "--quiet"]
    assert (
        main(
            [
                "batch",
                "propagate",
                str(tmp_path / "cat.csv"),
                str(tmp_path / "from_csv"),
                "--columns",
                mapping,
                "--keep",
                "source_id",
                *common,
            ]
        )
        == 0
    )
    (tmp_path / "map.toml").write_text(
        "[columns]\n" + "".join(f'{k} = "{v}"\n' for k, v in MAPPING.items())
    )
    assert (
        main(
            [
                "batch",
                "propagate",
                str(tmp_path / "cat.parquet"),
                str(tmp_path / "from_pq"),
                "--columns-file",
                str(tmp_path / "map.toml"),
                "--keep",
                "source_id",
                *common,
            ]
        )
        == 0
    )
    printed = capsys.readouterr().out
    assert "5000 rows" in printed
    a, b = read_output(tmp_path / "from_csv"), read_output(tmp_path / "from_pq")
    for name in a.columns:
        assert_bitwise_equal(a[name].to_numpy(), b[name].to_numpy(), name)
    meta = json.loads((tmp_path / "from_pq" / batch.METADATA_FILE).read_text())
    assert meta["parameters"]["target_epoch"]["given"] == "J2031.5"
    # Missing column: exit status 2, a message naming the column, nothing written.
    code = main(
        [
            "batch",
            "propagate",
            str(tmp_path / "cat.parquet"),
            str(tmp_path / "nope"),
            "--columns",
            "ra_deg=RAdeg",
            *common,
        ]
    )
    assert code == 2
    err = capsys.readouterr().err
    assert "'RAdeg'" in err and "ra_deg" in err
    assert not (tmp_path / "nope").exists()
    # An existing output is not overwritten unless asked.
    assert (
        main(
            [
                "batch",
                "propagate",
                str(tmp_path / "cat.parquet"),
                str(tmp_path / "from_pq"),
                "--columns",
                mapping,
                *common,
            ]
        )
        == 2
    )
    assert "--overwrite" in capsys.readouterr().err


def test_per_row_catalogue_epoch_and_light_time_model(tmp_path):
    cat = synthetic_catalogue(20_000, seed=11)
    cat = cat[~bad_row_mask(cat)].reset_index(drop=True)
    cat["ref_epoch"] = np.where(np.arange(len(cat)) % 2 == 0, 2016.0, 1991.25)
    write_parquet(cat, tmp_path / "cat.parquet")
    run(
        tmp_path / "cat.parquet",
        tmp_path / "out",
        columns={**MAPPING, "catalogue_epoch_jyear": "ref_epoch"},
        params={"target_epoch_jyear": TARGET_EPOCH, "model": "light_time"},
    )
    out = read_output(tmp_path / "out")
    ref = core.propagate(
        *(cat[MAPPING[name]].to_numpy() for name in MAPPING),
        cat["ref_epoch"].to_numpy(),
        TARGET_EPOCH,
        model="light_time",
    )
    for name in OUT_FLOATS:
        assert_bitwise_equal(out[name].to_numpy(), getattr(ref.astrometry, name), name)
    assert_bitwise_equal(out["propagation_flags"].to_numpy(), ref.flags, "flags")
    meta = batch.read_metadata(tmp_path / "out")
    assert meta["parameters"]["catalogue_epoch"] == {
        "column": "ref_epoch",
        "unit": "Julian epoch (TDB), yr",
    }
    assert meta["parameters"]["model"] == "light_time"


def test_output_read_as_a_directory_keeps_the_input_order(tmp_path):
    """Without --keep, the row order is all that ties an output row to its star. An output
    of more than ten parts, read back as a directory by pyarrow (and so by pandas), must
    give the rows in the input's order: those readers order the files by name, and parts
    named part.0, part.1, part.10, ..., part.2 put the eleventh part's rows before the
    third's. The reference is the core on the whole catalogue, row for row."""
    cat = synthetic_catalogue(3_000, seed=12)
    cat = cat[~bad_row_mask(cat)].reset_index(drop=True)
    cat.to_csv(tmp_path / "cat.csv", index=False)
    summary = run_csv(tmp_path / "cat.csv", tmp_path / "out", keep=[], blocksize="10KB")
    assert summary.metadata["input"]["partitions"] > 10
    out = pq.read_table(tmp_path / "out").to_pandas()  # the directory, as a user reads it
    ref = core.propagate(
        *(pd.read_csv(tmp_path / "cat.csv")[MAPPING[name]].to_numpy() for name in MAPPING),
        CATALOGUE_EPOCH,
        TARGET_EPOCH,
    )
    for name in OUT_FLOATS:
        assert_bitwise_equal(out[name].to_numpy(), getattr(ref.astrometry, name), name)


def test_column_mapping_parsing(tmp_path):
    assert batch.parse_column_mapping("ra_deg=RA, dec_deg = DE") == {
        "ra_deg": "RA",
        "dec_deg": "DE",
    }
    (tmp_path / "m.json").write_text(json.dumps({"ra_deg": "RA", "dec_deg": "DEC"}))
    assert batch.parse_column_mapping("dec_deg=DE", str(tmp_path / "m.json")) == {
        "ra_deg": "RA",
        "dec_deg": "DE",
    }
    with pytest.raises(batch.BatchInputError, match="canonical_name=COLUMN"):
        batch.parse_column_mapping("ra_deg")
    with pytest.raises(batch.BatchInputError, match="unknown field name"):
        batch.make_plan(
            "propagate",
            {"ra": "float64"},
            columns={"right_ascension": "ra"},
            params={"catalogue_epoch_jyear": 2016.0, "target_epoch_jyear": 2000.0},
        )
    # One mapping for every job of a catalogue: fields of other jobs are ignored.
    shared = {**MAPPING, "parallax_error_mas": "e_Plx", "catalogue_epoch_jyear": "Epoch"}
    schema = {col: "float64" for col in shared.values()}
    plan = batch.make_plan("constellations", schema, columns=shared, params={})
    assert plan.mapping == {"ra_deg": "RA_ICRS", "dec_deg": "DE_ICRS"}  # positions as given
    plan = batch.make_plan(
        "propagate", schema, columns=shared, params={"target_epoch_jyear": 2000.0}
    )
    assert "parallax_error_mas" not in plan.mapping
    assert plan.mapping["catalogue_epoch_jyear"] == "Epoch"
    with pytest.raises(batch.BatchInputError, match="not numeric"):
        batch.make_plan(
            "propagate",
            {
                "ra_deg": "object",
                "dec_deg": "float64",
                "pm_ra_cosdec_mas_yr": "float64",
                "pm_dec_mas_yr": "float64",
            },
            params={"catalogue_epoch_jyear": 2016.0, "target_epoch_jyear": 2000.0},
        )


def test_velocity_job_equals_kinematics_core_bitwise(tmp_path):
    from service.core import kinematics

    cat = synthetic_catalogue(100_000, seed=5)
    cat = cat[~bad_row_mask(cat)].reset_index(drop=True)
    rng = np.random.default_rng(6)
    n = len(cat)
    cat["e_Plx"] = rng.uniform(0.01, 0.5, n)
    cat["e_pmRA"] = rng.uniform(0.01, 0.5, n)
    cat["e_pmDE"] = rng.uniform(0.01, 0.5, n)
    cat["e_RV"] = np.where(np.isnan(cat["RV"]), np.nan, rng.uniform(0.1, 3.0, n))
    cat["plx_pmra_corr"] = rng.uniform(-0.5, 0.5, n)
    cat.loc[::10, "plx_pmra_corr"] = np.nan  # not given: taken as 0, as the HTTP API does
    # Correlated with the radial velocity (as a covariance propagated to another epoch is):
    # these columns used to be no field of the job, so a catalogue's values were left out.
    cat["plx_rv_corr"] = rng.uniform(-0.5, 0.5, n)
    cat.loc[:49_999, "plx_rv_corr"] = np.nan  # whole partitions without, as the API's blocks
    write_parquet(cat, tmp_path / "cat.parquet", row_group_rows=20_000)
    columns = {
        **MAPPING,
        "parallax_error_mas": "e_Plx",
        "pm_ra_cosdec_error_mas_yr": "e_pmRA",
        "pm_dec_error_mas_yr": "e_pmDE",
        "radial_velocity_error_km_s": "e_RV",
        "correlation_parallax_pm_ra": "plx_pmra_corr",
        "correlation_parallax_radial_velocity": "plx_rv_corr",
    }
    summary = batch.run_batch(
        "velocity",
        tmp_path / "cat.parquet",
        tmp_path / "out",
        columns=columns,
        keep=["source_id"],
        params={"catalogue_epoch_jyear": CATALOGUE_EPOCH},
        blocksize="1MiB",
    )
    assert summary.metadata["input"]["partitions"] >= 4
    out = read_output(tmp_path / "out")
    nan = np.full(n, np.nan)
    ref = kinematics.space_velocity(
        *(cat[MAPPING[name]].to_numpy() for name in MAPPING),
        distance_pc=nan,
        parallax_error_mas=cat["e_Plx"].to_numpy(),
        pm_ra_cosdec_error_mas_yr=cat["e_pmRA"].to_numpy(),
        pm_dec_error_mas_yr=cat["e_pmDE"].to_numpy(),
        parallax_pm_ra_cosdec_corr=np.nan_to_num(cat["plx_pmra_corr"].to_numpy(), nan=0.0),
        parallax_pm_dec_corr=np.zeros(n),
        pm_ra_cosdec_pm_dec_corr=np.zeros(n),
        radial_velocity_error_km_s=cat["e_RV"].to_numpy(),
        parallax_radial_velocity_corr=np.nan_to_num(cat["plx_rv_corr"].to_numpy(), nan=0.0),
        distance_error_pc=nan,
        epoch_jyear=CATALOGUE_EPOCH,
        relative_to_lsr=True,
    )
    expected = {
        "distance_pc": ref.distance_pc,
        "transverse_velocity_km_s": ref.transverse_velocity_km_s,
        "total_velocity_km_s": ref.total_velocity_km_s,
        "u_km_s": ref.uvw_km_s[:, 0],
        "v_lsr_km_s": ref.uvw_lsr_km_s[:, 1],
        "w_error_km_s": ref.uvw_error_km_s[:, 2],
        "correlation_u_v": ref.uvw_correlation[:, 0],
        "total_velocity_error_km_s": ref.total_velocity_error_km_s,
        "closest_approach_epoch_jyear": ref.closest_approach_epoch_jyear,
    }
    for name, values in expected.items():
        assert_bitwise_equal(out[name].to_numpy(), values, name)
    assert_bitwise_equal(out["velocity_flags"].to_numpy(), ref.flags, "velocity_flags")
    # Non-trivial: U V W known for the stars with radial velocity and positive parallax.
    assert np.count_nonzero(np.isfinite(out["u_km_s"])) > n // 5
    meta = batch.read_metadata(tmp_path / "out")
    assert meta["parameters"]["solar_motion_km_s"] == [11.1, 12.24, 7.25]
    assert set(meta["input"]["absent_optional_fields"]) == {
        "distance_pc",
        "distance_error_pc",
        "correlation_parallax_pm_dec",
        "correlation_pm_ra_pm_dec",
        "correlation_pm_ra_radial_velocity",
        "correlation_pm_dec_radial_velocity",
    }


def test_constellations_job_equals_constellation_core_bitwise(tmp_path):
    from service.core import constellations

    cat = synthetic_catalogue(200_000, seed=9)
    # Proper motions are optional here (a star without them stays put, flagged): only the
    # positions make a row bad.
    ra, dec = cat["RA_ICRS"].to_numpy(), cat["DE_ICRS"].to_numpy()
    with np.errstate(invalid="ignore"):
        bad = np.isnan(ra) | (ra < 0) | (np.abs(dec) > 90)
    assert np.count_nonzero(bad) == 30 and np.isnan(cat["pmDE"]).sum() == 10
    write_parquet(cat, tmp_path / "cat.parquet", row_group_rows=40_000)
    good = ~bad
    abbreviations = np.asarray(constellations.boundary_table().abbreviations)
    # Positions as given: only ra/dec are read.
    fixed = batch.run_batch(
        "constellations",
        tmp_path / "cat.parquet",
        tmp_path / "fixed",
        columns=MAPPING,
        keep=["source_id"],
        params={},
        blocksize="1MiB",
    )
    assert set(fixed.metadata["input"]["column_mapping"]) == {"ra_deg", "dec_deg"}
    assert fixed.metadata["data_tables"]["constellation_boundaries"]["sha256"]
    ref = constellations.locate(cat["RA_ICRS"].to_numpy()[good], cat["DE_ICRS"].to_numpy()[good])
    out = read_output(tmp_path / "fixed")
    assert np.array_equal(
        out["constellation"].to_numpy()[good].astype(str), abbreviations[ref.index]
    )
    assert out["constellation"].isna()[bad].all()
    assert_bitwise_equal(
        out["boundary_margin_arcsec"].to_numpy()[good], ref.margin_arcsec, "margin"
    )
    assert_bitwise_equal(out["constellation_flags"].to_numpy()[good], ref.flags, "flags")
    # Moved to another epoch first, with a per-row catalogue epoch.
    moved = batch.run_batch(
        "constellations",
        tmp_path / "cat.parquet",
        tmp_path / "moved",
        columns=MAPPING,
        keep=["source_id"],
        params={"epoch_jyear": 12016.0, "catalogue_epoch_jyear": CATALOGUE_EPOCH},
        blocksize="1MiB",
    )
    assert moved.metadata["parameters"]["epoch"]["julian_epoch_tdb"] == 12016.0
    ref = constellations.locate_moving(
        *(cat[MAPPING[name]].to_numpy()[good] for name in MAPPING),
        CATALOGUE_EPOCH,
        12016.0,
    )
    out = read_output(tmp_path / "moved")
    assert np.array_equal(
        out["constellation"].to_numpy()[good].astype(str), abbreviations[ref.index]
    )
    assert np.array_equal(
        out["constellation_across"].to_numpy()[good].astype(str),
        abbreviations[ref.other_side_index],
    )
    assert_bitwise_equal(
        out["boundary_margin_arcsec"].to_numpy()[good], ref.margin_arcsec, "margin"
    )
    assert_bitwise_equal(out["constellation_flags"].to_numpy()[good], ref.flags, "flags")
    # Implausible inputs: the propagation's bits of them, for every good row.
    implausible = core.input_flags(
        *(cat[MAPPING[name]].to_numpy()[good] for name in list(MAPPING)[2:])
    ) & int(core.IMPLAUSIBLE_INPUT_FLAGS)
    assert_bitwise_equal(out["implausible_input_flags"].to_numpy()[good], implausible, "inputs")
    assert np.count_nonzero(implausible & int(core.PropagationFlag.PROPER_MOTION_IMPLAUSIBLE))
    assert out["constellation"].isna()[bad].all()
    unknown_pm = np.isnan(cat["pmDE"].to_numpy())
    names = batch.flag_names(
        out["constellation_flags"][unknown_pm], "constellation_flags", "constellations"
    )
    assert all("proper_motion_missing" in n for n in names)
    # 10,000 years of motion moves some stars into other constellations.
    assert (
        np.count_nonzero(
            out["constellation"].to_numpy().astype(str)
            != read_output(tmp_path / "fixed")["constellation"].to_numpy().astype(str)
        )
        > 10
    )


def test_implausible_inputs_flagged_by_every_job(tmp_path):
    """A parallax above 1,000 mas (768,070: Proxima Centauri's 768.07 mas in Gaia DR3, from
    memory, given in microarcseconds; bound: common practice, core.constants) is flagged
    parallax_implausible by the propagate and velocity jobs, 768.07 itself is not, and the
    constellations job names implausible inputs (as the API's constellation answers do) in
    its implausible_input_flags column, with the propagation's bits, when it moves stars."""
    from service.core import kinematics

    cat = pd.DataFrame(
        {
            "source_id": np.arange(4, dtype=np.int64),
            "RA_ICRS": [217.4] * 4,
            "DE_ICRS": [-62.7] * 4,
            "Plx": [768.07, 768_070.0, 20.0, 20.0],
            "pmRA": [100.0, 100.0, 100.0, 30_000.0],
            "pmDE": [50.0] * 4,
            "RV": [20.0, 20.0, -41_700.0, 20.0],
        }
    )
    write_parquet(cat, tmp_path / "cat.parquet")
    columns = [cat[MAPPING[name]].to_numpy() for name in MAPPING]
    F = core.PropagationFlag
    KF = kinematics.KinematicsFlag
    runs = {}
    for job, params in (
        ("propagate", {"catalogue_epoch_jyear": CATALOGUE_EPOCH, "target_epoch_jyear": 2100.0}),
        ("velocity", {}),
        ("constellations", {"epoch_jyear": 2100.0, "catalogue_epoch_jyear": CATALOGUE_EPOCH}),
        ("constellations", {}),
    ):
        dest = tmp_path / f"{job}-{len(params)}"
        summary = batch.run_batch(job, tmp_path / "cat.parquet", dest, columns=MAPPING,
                                  keep=["source_id"], params=params)  # fmt: skip
        runs[job, len(params)] = (read_output(dest), summary)
    out, summary = runs["propagate", 2]
    ref = core.propagate(*columns, CATALOGUE_EPOCH, 2100.0)
    assert_bitwise_equal(out["propagation_flags"].to_numpy(), ref.flags, "propagation_flags")
    assert [bool(x & F.PARALLAX_IMPLAUSIBLE) for x in ref.flags] == [False, True, False, False]
    assert summary.flag_counts["propagation_flags"]["parallax_implausible"] == 1
    bit = summary.metadata["flags"]["propagation_flags"][str(int(F.PARALLAX_IMPLAUSIBLE))]
    assert bit["name"] == "parallax_implausible" and "microarcseconds" in bit["meaning"]
    out, summary = runs["velocity", 0]
    got = (out["velocity_flags"].to_numpy() & int(KF.PARALLAX_IMPLAUSIBLE)) != 0
    assert got.tolist() == [False, True, False, False]
    assert summary.flag_counts["velocity_flags"]["parallax_implausible"] == 1
    out, summary = runs["constellations", 2]
    expected = core.input_flags(*columns[2:]) & int(core.IMPLAUSIBLE_INPUT_FLAGS)
    assert_bitwise_equal(out["implausible_input_flags"].to_numpy(), expected, "implausible")
    names = batch.flag_names(out["implausible_input_flags"], "implausible_input_flags",
                             "constellations")  # fmt: skip
    assert [list(n) for n in names] == [
        [], ["parallax_implausible"], ["radial_velocity_implausible"],
        ["proper_motion_implausible"],
    ]  # fmt: skip
    assert summary.flag_counts["implausible_input_flags"] == {
        "proper_motion_implausible": 1,
        "space_velocity_implausible": 0,
        "radial_velocity_implausible": 1,
        "parallax_implausible": 1,
    }
    table = summary.metadata["flags"]["implausible_input_flags"]
    assert table[str(int(F.PARALLAX_IMPLAUSIBLE))]["name"] == "parallax_implausible"
    assert all(entry["meaning"] for entry in table.values())
    # Without --epoch only the positions are read: nothing to flag.
    out, summary = runs["constellations", 0]
    assert not out["implausible_input_flags"].to_numpy().any()


def test_row_checks_agree_with_the_field_definitions():
    """The two-reduction fast path and the per-row path give the documented flags."""
    rng = np.random.default_rng(12)
    n = 5000
    plan = batch.make_plan(
        "propagate",
        {name: "float64" for name in MAPPING},
        params={"catalogue_epoch_jyear": 2016.0, "target_epoch_jyear": 2000.0},
    )
    specials = np.array([np.nan, np.inf, -np.inf, 95.0, -1.0, 361.0, 4e5])
    inputs = {}
    for name in MAPPING:
        x = rng.uniform(0.0, 80.0, n)
        pick = rng.random(n) < 0.02
        x[pick] = rng.choice(specials, pick.sum())
        inputs[name] = x
    flags = batch.engine.row_checks(plan, inputs)
    expected = np.zeros(n, dtype=np.uint32)
    for name, x in inputs.items():
        f = plan.job.field(name)
        for i in range(n):
            v = x[i]
            if np.isnan(v):
                expected[i] |= f.required * int(batch.RowFlag.REQUIRED_VALUE_MISSING)
            elif not (np.isfinite(v) and f.low <= v <= f.high):
                expected[i] |= int(batch.RowFlag.VALUE_OUT_OF_RANGE)
    assert np.array_equal(flags, expected)
    clean = {k: np.where(expected != 0, 1.0, v) for k, v in inputs.items()}
    assert not batch.engine.row_checks(plan, clean).any()


def test_building_the_command_line_does_not_import_dask():
    """The service (skydrift serve) must not need the batch extra."""
    import subprocess
    import sys

    code = (
        "import sys; from service.cli import build_parser; build_parser(); "
        "assert not [m for m in sys.modules if m.split('.')[0] in ('dask', 'pyarrow', "
        "'distributed', 'pandas')], 'imported'"
    )
    subprocess.run(
        [sys.executable, "-c", code], check=True, cwd=str(pathlib.Path(__file__).parents[1])
    )


@pytest.mark.parametrize("where", ["same", "parent", "inside"])
def test_output_overlapping_the_input_is_refused_before_anything_is_touched(tmp_path, where):
    # With --overwrite, dask empties the output directory first: an output that was the
    # input's own directory, or held it, deleted the catalogue (and anything beside it).
    src_dir = tmp_path / "cat" / "in"
    src_dir.mkdir(parents=True)
    write_parquet(synthetic_catalogue(100, seed=3), src_dir / "part.parquet")
    (src_dir / "notes.txt").write_text("keep me")
    dest = {"same": src_dir, "parent": tmp_path / "cat", "inside": src_dir / "out"}[where]
    with pytest.raises(batch.BatchInputError, match="overlaps the input"):
        run(src_dir, dest, overwrite=True)
    assert sorted(p.name for p in src_dir.iterdir()) == ["notes.txt", "part.parquet"]
    run(src_dir, tmp_path / "elsewhere", overwrite=True)  # a separate output is fine


@pytest.mark.parametrize("job", ["propagate", "constellations", "velocity"])
def test_row_without_its_per_row_catalogue_epoch(tmp_path, job):
    # A null epoch in a mapped per-row column: propagation answered the row with NaNs and no
    # flag, the constellation job stopped with an IndexError. The stars are moved from that
    # epoch, so the row is not computed and says why; velocities only date the closest
    # approach with it, so they are still given there.
    cat = synthetic_catalogue(200, seed=5)
    cat = cat[~bad_row_mask(cat)].reset_index(drop=True)
    cat["ref_epoch"] = 2016.0
    cat.loc[3, "ref_epoch"] = np.nan
    write_parquet(cat, tmp_path / "cat.parquet")
    params = {
        "propagate": {"target_epoch_jyear": TARGET_EPOCH},
        "constellations": {"epoch_jyear": TARGET_EPOCH},
        "velocity": {},
    }[job]
    batch.run_batch(job, tmp_path / "cat.parquet", tmp_path / "out", params=params,
                    columns={**MAPPING, "catalogue_epoch_jyear": "ref_epoch"},
                    keep=["source_id"])  # fmt: skip
    out = read_output(tmp_path / "out")
    missing = (out["row_flags"].to_numpy() & int(batch.RowFlag.REQUIRED_VALUE_MISSING)) != 0
    assert list(np.flatnonzero(missing)) == ([] if job == "velocity" else [3])
    if job == "velocity":
        assert np.isfinite(out.loc[3, "transverse_velocity_km_s"])


def test_command_line_failure_part_way_leaves_no_output_and_no_traceback(tmp_path, capsys):
    # A cell that is no number far into a CSV (past the sample pandas types the columns
    # from) stopped the run with a traceback and left Parquet parts that read back as a
    # smaller catalogue.
    from service.cli import main

    cat = synthetic_catalogue(20_000, seed=4)
    cat["Plx"] = cat["Plx"].astype(object)
    cat.loc[19_990, "Plx"] = "abc"
    cat.to_csv(tmp_path / "cat.csv", index=False)
    mapping = ",".join(f"{k}={v}" for k, v in MAPPING.items())
    args = ["batch", "propagate", str(tmp_path / "cat.csv"), str(tmp_path / "out"),
            "--columns", mapping, "--catalogue-epoch", "J2016.0", "--target-epoch", "J2031.5",
            "--quiet", "--blocksize", "100KB", "--local", "synchronous"]  # fmt: skip
    assert main(args) == 1
    err = capsys.readouterr().err
    assert err.startswith("skydrift batch propagate: ") and "Traceback" not in err
    assert err.count("\n") == 1  # one line, naming the file, the line and the column
    where = "cat.csv: line 19992: column 'Plx' (for parallax_mas, in mas)"
    assert f"{where}: 'abc' is not a number" in err
    assert not (tmp_path / "out").exists()


def test_batch_bounds_match_the_api_and_booleans_are_no_numbers(tmp_path):
    # A parallax of 1e308 mas gave declination -45 and NaN motions without a flag; the API
    # refuses anything beyond 1e10 mas (core.constants.MAX_ABS_MAS), so such rows are now
    # not computed and flagged value_out_of_range. A true/false column read False as 0 mas.
    cat = synthetic_catalogue(50, seed=6)
    cat = cat[~bad_row_mask(cat)].reset_index(drop=True)
    cat.loc[2, "Plx"] = 1e308
    cat.loc[4, "pmRA"] = -2e10
    write_parquet(cat, tmp_path / "cat.parquet")
    run(tmp_path / "cat.parquet", tmp_path / "out")
    out = read_output(tmp_path / "out")
    bad = (out["row_flags"].to_numpy() & int(batch.RowFlag.VALUE_OUT_OF_RANGE)) != 0
    assert list(np.flatnonzero(bad)) == [2, 4]
    cat["Plx"] = cat["Plx"] > 5.0
    write_parquet(cat, tmp_path / "bool.parquet")
    with pytest.raises(batch.BatchInputError, match="not numeric"):
        run(tmp_path / "bool.parquet", tmp_path / "out2")


# ---------------------------------------------------------------------------------------
# CSV input: read by the same rule as the API and the per-file commands (api.csvio)
# ---------------------------------------------------------------------------------------

#: Rows of the CSV catalogues below: with 100 kB blocks, about ten partitions, so a row far
#: into the file is read only when the run works (the first rows are read when it opens).
CSV_ROWS = 5000
FAR_LINE = CSV_ROWS - 100  # a line in one of the last partitions


def csv_catalogue(tmp_path, edits=(), *, layout="every-column", name="cat.csv"):
    """The synthetic catalogue (good rows only) as CSV, with lines replaced.

    ``edits``: (line number in the file, header = 1; function of the line's text -> new
    text). ``layout``: "every-column" (every column is read), "some-columns" (a text column
    no job reads), "quoted" (a kept text column, quoted: its cells hold commas) or
    "quoted-unused" (the same, not read).
    """
    cat = synthetic_catalogue(CSV_ROWS, seed=8)
    cat = cat[~bad_row_mask(cat)].reset_index(drop=True)
    if layout == "some-columns":
        cat["note"] = "n"
    elif layout.startswith("quoted"):
        cat["name"] = [f"Star {i}, the {i % 7}th" for i in range(len(cat))]
    lines = cat.to_csv(index=False, lineterminator="\n").splitlines()
    for number, edit in edits:
        lines[number - 1] = edit(lines[number - 1])
    path = tmp_path / name
    path.write_text("\n".join(lines) + "\n")
    return path


CSV_LAYOUTS = ["every-column", "some-columns", "quoted", "quoted-unused"]


def header_cells(layout: str) -> int:
    return 7 if layout == "every-column" else 8


def run_layout(path, dest, layout: str, **kw):
    keep = ["source_id", "name"] if layout == "quoted" else ["source_id"]
    return run_csv(path, dest, keep=keep, **kw)


def run_csv(path, dest, **kw):
    kw.setdefault("blocksize", "100KB")
    return run(path, dest, local="synchronous", **kw)


def refused(line: int):
    """The error a refused row raises: before any work in the first rows, else part-way."""
    return batch.BatchInputError if line < 10 else batch.BatchDataError


def drop_cells(k: int):
    """An edit: the line without its last ``k`` cells (quoted cells kept whole)."""

    def edit(text):
        buf = io.StringIO()
        csv.writer(buf, lineterminator="").writerow(next(csv.reader([text]))[:-k])
        return buf.getvalue()

    return edit


def set_cell(column: int, value: str):
    def edit(text):
        cells = text.split(",")
        cells[column] = value
        return ",".join(cells)

    return edit


@pytest.mark.parametrize("layout", CSV_LAYOUTS)
@pytest.mark.parametrize("line", [3, FAR_LINE], ids=["first-rows", "far"])
def test_csv_row_with_missing_trailing_cells_is_refused(tmp_path, line, layout):
    # pandas filled the missing cells with NaN: the row was computed (or flagged) as if
    # its parallax and motions were unknown. The API refuses the row by its line.
    path = csv_catalogue(tmp_path, [(line, drop_cells(2))], layout=layout)
    n = header_cells(layout)
    with pytest.raises(refused(line), match=rf"cat\.csv: line {line}: row has {n - 2} cells; "
                       rf"the header has {n}$"):  # fmt: skip
        run_layout(path, tmp_path / "out", layout)
    assert not (tmp_path / "out").exists()


def test_csv_refusal_on_the_command_line_is_one_line_and_leaves_nothing(tmp_path, capsys):
    from service.cli import main

    path = csv_catalogue(tmp_path, [(FAR_LINE, drop_cells(1))])
    mapping = ",".join(f"{k}={v}" for k, v in MAPPING.items())
    args = ["batch", "propagate", str(path), str(tmp_path / "out"), "--columns", mapping,
            "--catalogue-epoch", "J2016.0", "--target-epoch", "J2031.5", "--quiet",
            "--blocksize", "100KB"]  # fmt: skip
    assert main(args) == 1
    err = capsys.readouterr().err
    assert err == (
        f"skydrift batch propagate: {path}: line {FAR_LINE}: row has 6 cells; the header has 7\n"
    )
    assert not (tmp_path / "out").exists()


@pytest.mark.parametrize(
    "mix",
    ["one-more", "many-more", "more-and-fewer", "trailing-comma-and-fewer"],
)
@pytest.mark.parametrize("layout", CSV_LAYOUTS)
def test_csv_row_with_more_cells_than_the_header_is_refused(tmp_path, mix, layout):
    # Reading only some columns, pandas ignored the extra cells (and, reading all, took the
    # first row's extra cell for an index). A row with one cell too many and another with
    # one too few leave the count of commas of the block unchanged: still refused.
    far = FAR_LINE
    edits = {
        "one-more": [(far, lambda t: t + ",1.5")],
        "many-more": [(2, lambda t: t + ",1,2,3")],
        "more-and-fewer": [(far - 20, drop_cells(1)), (far, lambda t: t + ",7")],
        "trailing-comma-and-fewer": [(far - 20, lambda t: t + ","), (far, drop_cells(1))],
    }[mix]
    path = csv_catalogue(tmp_path, edits, layout=layout)
    first = edits[0][0]
    n = header_cells(layout)
    cells = {"one-more": n + 1, "many-more": n + 3, "more-and-fewer": n - 1,
             "trailing-comma-and-fewer": n + 1}[mix]  # fmt: skip
    with pytest.raises(refused(first), match=rf"line {first}: row has {cells} cells; "
                       rf"the header has {n}$"):  # fmt: skip
        run_layout(path, tmp_path / "out", layout)
    assert not (tmp_path / "out").exists()


@pytest.mark.parametrize("word", ["nan", "NaN", "-nan", "NA", "N/A", "null", "NULL", "None"])
def test_csv_cells_read_as_unknown_only_when_empty(tmp_path, word):
    # pandas' default na_values read these as unknown; the API takes an empty cell as
    # unknown and refuses every other text that is no number (api.tables, csv cells).
    path = csv_catalogue(tmp_path, [(FAR_LINE, set_cell(3, word))])  # Plx, optional
    with pytest.raises(batch.BatchDataError, match=rf"line {FAR_LINE}: column 'Plx' \(for "
                       rf"parallax_mas, in mas\): '{re.escape(word)}' is not a number; leave "
                       "the cell empty for an unknown value$"):  # fmt: skip
        run_csv(path, tmp_path / "out")
    # In the first rows (which give the columns their types) it is found before any work.
    path = csv_catalogue(tmp_path, [(4, set_cell(1, word))], name="first.csv")  # RA_ICRS
    with pytest.raises(batch.BatchInputError, match=rf"first\.csv: line 4: column 'RA_ICRS' \("
                       rf"for ra_deg, in deg\): '{re.escape(word)}' is not a number"):  # fmt: skip
        run_csv(path, tmp_path / "out")
    # An empty cell is still unknown: the row is computed without a parallax.
    path = csv_catalogue(tmp_path, [(FAR_LINE, set_cell(3, ""))], name="empty.csv")
    run_csv(path, tmp_path / "out")
    out = read_output(tmp_path / "out")
    assert np.isnan(out["parallax_mas"].iloc[FAR_LINE - 2])
    names = batch.flag_names(out["propagation_flags"].iloc[[FAR_LINE - 2]], "propagation_flags",
                             "propagate")  # fmt: skip
    assert "parallax_missing" in names[0]


def test_csv_header_name_missing_is_refused(tmp_path):
    """A header with an empty name (a trailing comma) is refused with the API's wording
    (service.api.csvio); pandas named it "Unnamed: 7" and the run went on."""
    path = csv_catalogue(tmp_path, [(1, lambda t: t + ",")])
    with pytest.raises(batch.BatchInputError, match=r"cat\.csv: line 1: column \d+ of the "
                       r"header has no name \(a trailing comma\?\)$"):  # fmt: skip
        run_csv(path, tmp_path / "out")
    assert not (tmp_path / "out").exists()


def test_csv_duplicated_column_name_is_refused(tmp_path, monkeypatch):
    # pandas renamed the second to "RA_ICRS.1" and the run read the first only.
    path = csv_catalogue(tmp_path, [(1, lambda t: t.replace("Plx", "RA_ICRS"))])

    def never(*args, **kwargs):  # pragma: no cover - failing the test is the point
        raise AssertionError("a partition was processed")

    with monkeypatch.context() as m:
        m.setattr(engine, "process_partition", never)
        with pytest.raises(batch.BatchInputError, match=r"cat\.csv: line 1: column 'RA_ICRS' "
                           "is given twice in the header$"):  # fmt: skip
            run_csv(path, tmp_path / "out", columns={**MAPPING, "parallax_mas": "RA_ICRS"})
    # In a later file of the input (each file has its own header): refused when read.
    (tmp_path / "parts").mkdir()
    csv_catalogue(tmp_path / "parts", name="a.csv")
    csv_catalogue(tmp_path / "parts", [(1, lambda t: t.replace("pmDE", "pmRA"))], name="b.csv")
    with pytest.raises(batch.BatchDataError, match=r"b\.csv: line 1: column 'pmRA' is given "
                       "twice in the header$"):  # fmt: skip
        run_csv(str(tmp_path / "parts" / "*.csv"), tmp_path / "out")
    assert not (tmp_path / "out").exists()


@pytest.mark.parametrize("text", ["1_0.5", "\u0661\u0662", "\uff13", "12\u0665"])
def test_csv_numbers_in_other_digits_or_with_underscores_are_refused(tmp_path, text):
    # The API refuses them (numbers.DECIMAL_TEXT); pandas refused them too, but in a dask
    # message about dtypes without file, line or column.
    path = csv_catalogue(tmp_path, [(FAR_LINE, set_cell(4, text))])  # pmRA
    with pytest.raises(batch.BatchDataError, match=rf"cat\.csv: line {FAR_LINE}: column 'pmRA' "
                       rf"\(for pm_ra_cosdec_mas_yr, in mas/yr\): '{text}' is not a number "
                       "written with ASCII digits and no underscores$"):  # fmt: skip
        run_csv(path, tmp_path / "out")


def test_csv_text_the_rule_accepts_reads_as_before(tmp_path):
    # The checks on CSV text must not refuse what is fine: Windows and old Mac line ends,
    # quoted cells (with commas), blank lines, blanks around numbers (a cell of blanks only
    # is refused, as pandas refused it before), a column not read.
    # Each gives bitwise the output of the same catalogue from Parquet.
    cat = synthetic_catalogue(CSV_ROWS, seed=9)
    write_parquet(cat, tmp_path / "cat.parquet")
    run(tmp_path / "cat.parquet", tmp_path / "from_parquet")
    expected = read_output(tmp_path / "from_parquet")
    text = cat.to_csv(index=False, lineterminator="\n")
    lines = text.splitlines()
    quoted = [f'"{h}"' for h in lines[0].split(",")]
    variants = {
        "crlf.csv": "\r\n".join(lines) + "\r\n",
        "cr.csv": "\r".join(lines[:200]) + "\r",  # dask needs a newline past 256 kB
        "quoted.csv": "\n".join([",".join(quoted + ['"note"'])]
                                + [f'{ln},"a, ""b"""' for ln in lines[1:]]) + "\n",
        "blank-lines.csv": "\n".join(lines[:100] + ["", "  "] + lines[100:]) + "\n\n",
        "blanks-around.csv": "\n".join(lines[:1] + [",".join(f" {c}\t" if c else c for c in
                                                              ln.split(",")) for ln in lines[1:]]),
        "unused-column.csv": "\n".join([lines[0] + ",note"] + [ln + ",x" for ln in lines[1:]]),
    }  # fmt: skip
    for name, content in variants.items():
        (tmp_path / name).write_bytes(content.encode())
        # dask cuts files into blocks at newlines only: old Mac line ends give one block.
        blocksize = None if name == "cr.csv" else "100KB"
        run_csv(tmp_path / name, tmp_path / f"from_{name}", blocksize=blocksize)
        got = read_output(tmp_path / f"from_{name}")
        assert list(got.columns) == list(expected.columns), name
        assert len(got) == (199 if name == "cr.csv" else len(expected)), name
        for column in expected.columns:
            assert_bitwise_equal(got[column].to_numpy(), expected[column].to_numpy()[: len(got)],
                                 f"{name}: {column}")  # fmt: skip


def test_csv_cell_counts_agree_with_the_csv_module():
    """The fast checks of cells per row (a count of commas, numpy passes over the bytes,
    quoted cells left out) refuse a block exactly when Python's csv module finds a row with
    another number of cells than the header: random blocks with quoted cells holding
    commas, quotes and newlines, CRLF line ends, blank lines, every column read or not."""
    from service.batch.csvinput import NA_OPTIONS, CsvRowError, read_block

    rng = random.Random(20261202)
    texts = ["a", "", "b c", "x, y", 'q "z"', "line\nbreak", "w,", ",", '""']
    refusals = 0
    for _ in range(400):
        n = rng.randint(2, 6)
        header = [f"c{i}" for i in range(n)]
        text_column = rng.randrange(n)
        buf = io.StringIO()
        writer = csv.writer(buf, lineterminator="\n",
                            quoting=rng.choice([csv.QUOTE_MINIMAL, csv.QUOTE_ALL]))  # fmt: skip
        writer.writerow(header)
        for _ in range(rng.randint(1, 30)):
            row = [rng.choice(texts) if k == text_column else rng.choice(["", "1.5", " 7 "])
                   for k in range(n)]  # fmt: skip
            u = rng.random()
            if u < 0.02:
                row = row[: rng.randint(1, n - 1)]
            elif u < 0.04:
                row += ["", "9"][: rng.randint(1, 2)]
            writer.writerow(row)
            if rng.random() < 0.05:
                buf.write(rng.choice(["\n", "  \n"]))
        text = buf.getvalue()
        if rng.random() < 0.3:
            text = text.replace("\n", "\r\n")
        wrong = any(
            len(r) != n
            for r in csv.reader(io.StringIO(text, newline=""))
            if r and not (len(r) == 1 and not r[0].strip(" \t"))
        )
        numbers = [h for k, h in enumerate(header) if k != text_column]
        usecols = header if rng.random() < 0.5 else numbers
        try:
            read_block(io.BytesIO(text.encode()), usecols=usecols,
                       dtype=dict.fromkeys(numbers, "float64"), **NA_OPTIONS)  # fmt: skip
        except CsvRowError as exc:
            assert wrong and "cells; the header has" in exc.message, text
            refusals += 1
        else:
            assert not wrong, text
    assert 100 < refusals < 300  # both kinds of blocks were tried


@pytest.mark.parametrize("tail", ["\n", "", "\r\n\r\n", "\n  \n"])
def test_csv_header_without_rows_is_a_catalogue_without_stars(tmp_path, tail):
    """A header and no rows holds no stars, as a Parquet file without rows does: both give
    an output of no rows with the same columns and types (pyarrow's Schema.equals), not a
    refusal saying that a column 'is not numeric (dtype string)' (pandas types a column
    without cells as text)."""
    cat = synthetic_catalogue(100, seed=8).iloc[:0]
    write_parquet(cat, tmp_path / "empty.parquet")
    path = tmp_path / "empty.csv"
    path.write_bytes(b"\xef\xbb\xbf" + ",".join(cat.columns).encode() + tail.encode())
    # The reference: Python's csv module reads the header and no row with a cell.
    rows = list(csv.reader(io.StringIO(path.read_text("utf-8-sig"), newline="")))
    assert [r for r in rows if "".join(r).strip()] == [list(cat.columns)]
    from_parquet = run(tmp_path / "empty.parquet", tmp_path / "out_parquet", local="synchronous")
    from_csv = run_csv(path, tmp_path / "out_csv")
    assert from_parquet.rows == from_csv.rows == 0
    # (The kept source_id aside: text with no cell to say it holds whole numbers.)
    schemas = [
        pq.read_table(tmp_path / out).drop_columns(["source_id"]).schema.remove_metadata()
        for out in ("out_parquet", "out_csv")
    ]
    assert schemas[0].equals(schemas[1])
    # A header-only first file of several: the rows of the others are read as numbers.
    (tmp_path / "parts").mkdir()
    (tmp_path / "parts" / "a.csv").write_bytes(path.read_bytes())
    csv_catalogue(tmp_path / "parts", name="b.csv")
    summary = run_csv(str(tmp_path / "parts" / "*.csv"), tmp_path / "out_parts")
    assert summary.rows == len(pd.read_csv(tmp_path / "parts" / "b.csv"))


def test_csv_kept_column_without_cells_in_its_first_rows_is_copied(tmp_path):
    """A kept identifier column whose first ten stars (the rows dask types the columns from)
    have no name was typed float64 for want of cells, and the first name after them ('HX
    12') stopped the run as 'not a number'. The kept cells must come out as Python's csv
    module reads them (an empty cell unknown)."""
    cat = synthetic_catalogue(100, seed=8)
    cat = cat[~bad_row_mask(cat)].reset_index(drop=True).iloc[:40]
    cat["name"] = ["" if i < 12 or i % 3 else f"HX {i}" for i in range(len(cat))]
    path = tmp_path / "cat.csv"
    cat.to_csv(path, index=False, lineterminator="\n")
    with open(path, newline="") as f:
        expected = [row["name"] or None for row in csv.DictReader(f)]  # the reference
    assert expected[:12] == [None] * 12 and "HX 12" in expected
    summary = run_csv(path, tmp_path / "out", keep=["source_id", "name"])
    assert summary.rows == len(cat)
    out = read_output(tmp_path / "out")
    got = [None if v is None or v != v else v for v in out["name"]]  # NaN or None: unknown
    assert got == expected


def test_csv_kept_whole_number_column_with_empty_cells_later_is_copied(tmp_path):
    """A kept identifier column of whole numbers (typed int64 from its first ten rows) with
    an empty cell further on stopped the run part-way ("the cell is empty, where the first
    rows of the file have whole numbers"). The kept values must come out as Python's csv
    module reads them, an empty cell unknown, whole numbers exact (ids above 2**53 too);
    a cell that is no whole number still stops the run naming its line."""
    cat = synthetic_catalogue(100, seed=8)
    cat = cat[~bad_row_mask(cat)].reset_index(drop=True).iloc[:40]
    ids = [str(2**60 + 7 * i) if i < 12 or i % 4 else "" for i in range(len(cat))]
    cat["source_id"] = ids
    path = tmp_path / "cat.csv"
    cat.to_csv(path, index=False, lineterminator="\n")
    with open(path, newline="") as f:
        expected = [
            int(row["source_id"]) if row["source_id"] else None for row in csv.DictReader(f)
        ]  # fmt: skip  (the reference)
    assert expected[12] is None and expected[13] == 2**60 + 91
    summary = run_csv(path, tmp_path / "out", keep=["source_id"])
    assert summary.rows == len(cat)
    out = pd.read_parquet(tmp_path / "out", dtype_backend="numpy_nullable")
    got = [None if v is pd.NA else int(v) for v in out["source_id"]]
    assert got == expected
    # Not a whole number: refused with its line (the header is line 1).
    cat["source_id"] = [*ids[:20], "12.5", *ids[21:]]
    cat.to_csv(path, index=False, lineterminator="\n")
    with pytest.raises(batch.BatchDataError, match=r"line 22: .*'12\.5' is not a whole number"):
        run_csv(path, tmp_path / "out2", keep=["source_id"])


def test_now_is_one_instant_in_a_run():
    """Every epoch option given as "now" in one run is the same instant (as in one API
    request), so that --catalogue-epoch now --target-epoch now moves the stars by nothing;
    and it is the clock's reading (astropy Time.now() as the reference, to 60 s)."""
    import time

    from astropy.time import Time

    from service.batch.spec import parse_epoch_option

    first = parse_epoch_option("now", "--catalogue-epoch")
    time.sleep(0.01)  # more than the 7.2 us a Julian epoch resolves
    assert parse_epoch_option(" NOW ", "--target-epoch") == first
    assert abs(first - Time.now().tdb.jyear) < 60 / (365.25 * 86400)


def test_constellations_job_flags_a_star_moved_off_a_pole(tmp_path):
    """As the API's constellation answers and the propagate job (PropagationFlag.AT_POLE):
    a star given at a pole and moved with --epoch moves along the east and north of the RA
    given, and its constellation_flags carry at_pole, with the meaning the API gives; 1e-6
    deg off the pole (cos(dec) 1.7e-8, above AT_POLE_RAD) it is not, nor without --epoch.
    The constellations reached (RA 45: Cepheus; RA 135: Ursa Minor) are astropy
    get_constellation's of the star moved by pyerfa starpm from 1e-9 deg off the pole on
    that meridian (tests/api/test_constellations_api.py)."""
    from service.core import constellations
    from service.core.flags import CONSTELLATION_AT_POLE_MEANING

    cat = pd.DataFrame(
        {
            "source_id": np.arange(3, dtype=np.int64),
            "RA_ICRS": [45.0, 135.0, 45.0],
            "DE_ICRS": [90.0, 90.0, 90.0 - 1e-6],
            "Plx": [100.0] * 3,
            "pmRA": [8000.0] * 3,
            "pmDE": [-4000.0] * 3,
            "RV": [0.0] * 3,
        }
    )
    write_parquet(cat, tmp_path / "cat.parquet")
    bit = int(constellations.ConstellationFlag.AT_POLE)
    for params, flagged in (
        ({"epoch_jyear": 3000.0, "catalogue_epoch_jyear": 2000.0}, [True, True, False]),
        ({}, [False, False, False]),
    ):
        dest = tmp_path / f"out-{len(params)}"
        summary = batch.run_batch("constellations", tmp_path / "cat.parquet", dest,
                                  columns=MAPPING, keep=["source_id"], params=params)  # fmt: skip
        out = read_output(dest)
        got = (out["constellation_flags"].to_numpy() & bit) != 0
        assert got.tolist() == flagged, params
        assert summary.flag_counts["constellation_flags"]["at_pole"] == sum(flagged)
        entry = summary.metadata["flags"]["constellation_flags"][str(bit)]
        assert entry["name"] == "at_pole"
        assert entry["meaning"].startswith(CONSTELLATION_AT_POLE_MEANING)
        if params:
            assert out["constellation"].astype(str).tolist() == ["Cep", "UMi", "Cep"]


def test_known_upstream_warning_filter_is_added_once_and_nothing_else_changes():
    # The batch run's one filter (pandas 3.1 deprecates reset_index(inplace=True), which
    # dask's Parquet code calls) goes in for good, first, once however many runs in however
    # many threads add it; the rest of the process-wide list is left as it was.
    import threading
    import warnings

    before = list(warnings.filters)
    threads = [threading.Thread(target=engine._silence_known_upstream_warnings) for _ in range(8)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    after = list(warnings.filters)
    mine = [f for f in after if f not in before]
    assert len(mine) <= 1 and after[0][0] == "ignore"
    assert after[0][1].pattern == "The inplace keyword in DataFrame.reset_index"
    assert after[0][3].pattern == "dask"
    assert [f for f in after if f is not after[0]] == [f for f in before if f != after[0]]
    with warnings.catch_warnings(record=True) as seen:  # the test's own scope, one thread
        warnings.simplefilter("always")
        warnings.filterwarnings(**engine.KNOWN_UPSTREAM_WARNING_FILTER)
        warnings.warn_explicit(
            "The inplace keyword in DataFrame.reset_index is deprecated", FutureWarning,
            "arrow.py", 619, module="dask.dataframe.io.parquet.arrow",
        )  # fmt: skip
        warnings.warn_explicit(
            "The inplace keyword in DataFrame.reset_index is deprecated", FutureWarning,
            "mine.py", 1, module="someone_else",
        )  # fmt: skip
    assert [str(w.message)[:11] for w in seen] == ["The inplace"]  # only the other caller's
