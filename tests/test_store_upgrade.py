"""Stores written by the previous layout (schema 1): finished depths kept, old pass caches dropped.

Schema 1 is the layout of leadline 0.1.0 before the growing-contour iteration: one array
per cached pass, ``passes/<fingerprint>-h<n_high>r<rows>``, chunk plans without a "flip"
field, and one in-flight ledger per depth.  :func:`write_schema1_store` writes that layout
with plain zarr, node for node as leadline 0.1.0 wrote it (a killed p = 1..2 sweep: p = 1
done, p = 2 running with cached passes and a ledger).

External reference: optimal V_p of the SK model (xi = x^2/2), Farhi, Goldstone, Gutmann,
Zhou, "The QAOA and the SK model at infinite size", Quantum 6, 759 (2022), Table 1:
0.3033 (p = 1), 0.4075 (p = 2).
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
import zarr

from leadline.storage import open_study, layout as L

FLAT = {"name": "default", "separator": "."}

# p = 1 as leadline 0.1.0 recorded it (the optimum of Quantum 6, 759 (2022): V_1 = 0.3033)
P1_RESULT = {
    "value": 0.30326532985631666, "p": 1, "xi": {"spec": "2:0.5", "terms": [[2, 0.5]]},
    "gamma": [0.4999999960752541], "beta": [0.39269908101167855], "gradient_norm": 9.521914923205088e-09,
    "evaluations": 11, "restarts": 1, "converged": True, "message": "CONVERGENCE: NORM OF PROJECTED GRADIENT <= PGTOL",
    "wall_time_s": 0.10271341899965591, "history": [], "plan": {"p": 1, "n_high": 1, "rows_per_chunk": 2},
}


def _old_pass(group, key: str, p: int, plan: dict, rng) -> None:
    n = 2 * p + 1
    data = rng.standard_normal((n + 1, n)) + 1j * rng.standard_normal((n + 1, n))
    np.fill_diagonal(data[:n], 1.0)
    group.create_array(key, data=data, chunk_key_encoding=FLAT, attributes={
        "fingerprint": key.split("-")[0], "kind": "forward", "n_chunks": 4, "completions": [1, 1, 1, 1],
        "wall_s": 0.0067, "plan": plan, "crc32": L.checksum(data), "stored_utc": "2026-12-01T10:00:00Z"})


def write_schema1_store(path: Path, pmax: int = 2) -> None:
    """A schema-1 store (leadline 0.1.0), killed while p = 2 was running."""
    rng = np.random.default_rng(1)
    spec = {"spec_version": 1, "name": "old-layout", "store": str(path), "depths": {"pmin": 1, "pmax": pmax},
            "optimizer": {"restarts": 0, "seed": 0, "gtol": 1e-07, "maxiter": 500},
            "compute": {"executor": "inprocess", "scheduler": None, "cluster_config": None, "workers": None,
                        "threads_per_worker": 1, "memory_mb": 0.016},
            "ensembles": [{"label": "sk", "kind": "dense", "xi": "2:0.5", "q": None, "degree": None,
                           "reference": {"ground_state": None, "source": None}}]}
    root = zarr.create_group(store=str(path), zarr_format=3, attributes={
        "format": "leadline.study", "schema_version": 1, "name": "old-layout", "spec": spec, "spec_toml": "",
        "created_utc": "2026-12-01T10:00:00Z", "writer": "leadline 0.1.0", "kernel": "blocked"})
    ens = root.create_group("ensembles").create_group("sk", attributes=spec["ensembles"][0])
    plan1 = {"p": 1, "n_high": 1, "rows_per_chunk": 2}
    p1 = ens.create_group("p001", attributes={
        "p": 1, "plan": plan1, "state": "done", "started_utc": "2026-12-01T10:00:00Z", "sessions": 1, "repairs": [],
        "result": P1_RESULT, "timings": {"wall_time_s": 0.1027, "pass_compute_s": 0.0327, "passes": 33},
        "finished_utc": "2026-12-01T10:00:01Z"})
    p1.create_array("gamma", data=np.array(P1_RESULT["gamma"]))
    p1.create_array("beta", data=np.array(P1_RESULT["beta"]))
    passes = p1.create_group("passes")
    for i in range(3):
        _old_pass(passes, f"{i:032x}-h1r2", 1, plan1, rng)
    plan2 = {"p": 2, "n_high": 4, "rows_per_chunk": 4}
    p2 = ens.create_group("p002", attributes={"p": 2, "plan": plan2, "state": "running",
                                              "started_utc": "2026-12-01T10:00:01Z", "sessions": 1, "repairs": []})
    passes = p2.create_group("passes")
    for i in range(5):
        _old_pass(passes, f"{i + 16:032x}-h4r4", 2, plan2, rng)
    inflight = p2.create_group("inflight", attributes={"key": f"{99:032x}-h4r4", "serial": 6, "n_chunks": 4,
                                                       "fingerprint": f"{99:032x}", "kind": "forward",
                                                       "started_utc": "2026-12-01T10:00:02Z"})
    partials = inflight.create_array("partials", shape=(4, 6, 5), chunks=(1, 6, 5), dtype="complex128",
                                     fill_value=0, chunk_key_encoding=FLAT)
    ledger = inflight.create_array("ledger", shape=(4, 4), chunks=(1, 4), dtype="int64", fill_value=0,
                                   chunk_key_encoding=FLAT, attributes={"columns": list(L.LEDGER_COLUMNS)})
    part = rng.standard_normal((6, 5)) + 0j
    partials[0] = part
    ledger[0] = [6, L.checksum(part), 1, 1500]


def _tree(path: Path) -> dict[str, bytes]:
    return {str(f.relative_to(path)): f.read_bytes() for f in sorted(path.rglob("*")) if f.is_file()}


def test_schema1_store_reads_and_resumes_keeping_finished_depths(tmp_path, capsys):
    from leadline.jobs.cli import main

    path = tmp_path / "old.zarr"
    write_schema1_store(path)
    # readable as it is: the finished depth, with plain zarr and with the read API
    depths = open_study(path).depths("sk")
    assert [d["p"] for d in depths] == [1] and depths[0]["value"] == P1_RESULT["value"]
    before = _tree(path / "ensembles/sk/p001")
    p1_record = zarr.open_group(str(path / "ensembles/sk/p001"), mode="r").attrs.asdict()

    main(["resume", str(path), "--quiet"])
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1, err  # one line says what was dropped
    assert "older leadline (schema 1)" in err[0] and "8 saved passes of 2 depths" in err[0]
    assert "finished depths are kept" in err[0]

    root = zarr.open_group(str(path), mode="r")
    assert root.attrs["format_version"] == L.SCHEMA_VERSION and "schema_version" not in root.attrs
    assert root.attrs["migrated"][0]["from"] == 1 and root.attrs["migrated"][0]["passes_dropped"] == 8
    # the finished depth is untouched: same record, same angle arrays, bit for bit
    after = _tree(path / "ensembles/sk/p001")
    assert {k: v for k, v in after.items() if not k.startswith("passes")} == \
        {k: v for k, v in before.items() if not k.startswith("passes")}
    assert root["ensembles/sk/p001"].attrs.asdict() == p1_record
    # no old-layout pass array and no old ledger survives anywhere
    for p in (1, 2):
        names = sorted(root[f"ensembles/sk/p00{p}"].keys())
        assert names == ["beta", "gamma"], names
    # the running depth was optimized again from its start: Quantum 6, 759 (2022), Table 1
    depths = open_study(path).depths("sk")
    assert [d["p"] for d in depths] == [1, 2]
    assert depths[1]["value"] == pytest.approx(0.4075, abs=5e-5)
    assert root["ensembles/sk/p002"].attrs["sessions"] == 2

    # a second resume has nothing to upgrade: silent
    main(["resume", str(path), "--quiet"])
    assert capsys.readouterr().err == ""


def test_chunk_plan_json_with_and_without_flip_keys_passes_apart():
    """Plans written before the flip field existed read as flip = False; a flipped plan is another key."""
    from leadline.kernels.exact import PassInput

    inp = PassInput(2, np.eye(5, dtype=complex), np.array([0.1, 0.2]))

    class Plan:  # a plan as the growing-contour planner writes it (to_json with a flip field)
        def __init__(self, **fields):
            self.fields = fields

        def to_json(self):
            return dict(self.fields)

    old = {"p": 2, "n_high": 4, "rows_per_chunk": 4}
    assert L.plan_json(old) == dict(old, flip=False)
    assert L.pass_key(inp, Plan(**old)) == L.pass_key(inp, Plan(**old, flip=False))
    assert L.pass_key(inp, Plan(**old)) != L.pass_key(inp, Plan(**old, flip=True))
    assert L.pass_key(inp, Plan(**old)) != L.pass_key(inp, Plan(p=2, n_high=3, rows_per_chunk=4))
    # the step's depth is part of the input fingerprint
    other = PassInput(3, np.eye(7, dtype=complex), np.array([0.1, 0.2, 0.3]))
    assert L.pass_key(inp, Plan(**old)).split("-")[0] != L.pass_key(other, Plan(**old)).split("-")[0]
    json.dumps(L.plan_json(Plan(**old, flip=True).to_json()))


# ------------------------------------------------------------------ schema 2 -> 3: renamed attributes
#: the reference energies of the SK model as `leadline reference --store` cached them (GS: Parisi value,
#: Crisanti & Rizzo, Phys. Rev. E 65, 046137 (2002): 0.763166; ALG = GS for SK, no overlap gap)
SCHEMA2_REFERENCES = {
    "xi": "2:0.5", "ground_state": 0.763166, "ground_state_uncertainty": 1e-6, "algorithmic_threshold": 0.763166,
    "algorithmic_threshold_uncertainty": 1e-6, "ground_state_k_sequence": [], "algorithmic_threshold_k_sequence": [],
    "overlap_gap": False, "wall_time": 1.0, "details": {},
}


def write_old_names_store(path: Path, schema: int) -> None:
    """A store with the attribute names of schemas 2-3 (schema 2: no integrity record; schema 3: a
    record over the old names): a p = 1..2 study with p = 1 done."""
    from leadline.jobs.cli import main

    spec = path.parent / "s2.toml"
    spec.write_text(f'[study]\nname = "s2"\nstore = "{path.name}"\n[depths]\npmax = 1\n[optimizer]\nrestarts = 0\n'
                    '[compute]\nexecutor = "inprocess"\nmemory-mib = 0.016\n[[ensemble]]\nlabel = "sk"\nxi = "2:0.5"\n')
    main(["sweep", str(spec), "--quiet"])
    root = zarr.open_group(str(path), mode="r+")
    attrs = root.attrs.asdict()
    s = attrs["spec"]
    old_spec = {"spec_version": 1, **{k: v for k, v in s.items() if k != "format_version"}}
    old_spec["depths"] = {"pmin": 1, "pmax": 2}
    old_spec["optimizer"] = {"restarts": 0, "seed": 0, "gtol": 1e-07, "maxiter": 500}
    old_spec["compute"] = {"executor": "inprocess", "scheduler": None, "cluster_config": None, "workers": None,
                           "threads_per_worker": 1, "memory_mb": 0.016}
    del root.attrs["format_version"]
    root.attrs.update({"schema_version": schema, "spec": old_spec})
    ens = root["ensembles/sk"]
    from leadline.kernels.reference import METHOD_VERSION

    ens.attrs["references"] = dict(SCHEMA2_REFERENCES, method_version=METHOD_VERSION)
    depth = root["ensembles/sk/p001"]
    timings = depth.attrs["timings"]
    session = timings["this_session"]
    session["passes_from_cache"] = session.pop("passes_reused")
    depth.attrs["timings"] = timings
    from leadline.storage import integrity as I

    if schema == 2:
        del root.attrs[I.RECORD]
    else:  # the record as that release wrote it: over the old spec, its layout version called "version"
        record = I.current_record(root.attrs[I.RECORD])
        record["version"] = record.pop("format_version")
        root.attrs[I.RECORD] = dict(record, identity=dict(record["identity"], spec=I.digest(old_spec)))


@pytest.mark.parametrize("schema", [2, 3])
def test_old_names_store_reads_with_new_names_and_resume_renames_in_place(tmp_path, capsys, schema):
    from leadline.jobs.cli import main

    path = tmp_path / "s2.zarr"
    write_old_names_store(path, schema)
    before = _tree(path)
    study = open_study(path)  # reading renames nothing on disk, but speaks the new names
    assert study.format_version == schema
    assert study.spec["optimizer"]["gradient_tol"] == 1e-07 and study.spec["optimizer"]["max_iterations"] == 500
    assert study.spec["compute"]["memory_mib"] == 0.016 and "cluster_config" not in study.spec["compute"]
    assert study.references("sk").ground_state == 0.763166
    assert "computed_reference" in study.ensemble("sk") and "references" not in study.ensemble("sk")
    main(["table", str(path), "--format", "json", "--output", str(tmp_path / "t.json")])
    table = json.loads((tmp_path / "t.json").read_text())
    assert table["ensembles"][0]["references"]["ground_state"] == 0.763166
    assert _tree(path) == before

    capsys.readouterr()
    main(["resume", str(path), "--quiet"])
    assert capsys.readouterr().err == ""  # renaming loses nothing: nothing to say
    root = zarr.open_group(str(path), mode="r")
    attrs = root.attrs.asdict()
    assert attrs["format_version"] == L.SCHEMA_VERSION == 4 and "schema_version" not in attrs
    assert [(m["from"], m["to"]) for m in attrs["migrated"]] == ([(2, 3)] if schema == 2 else []) + [(3, 4)]
    spec = attrs["spec"]
    assert spec["format_version"] == 2 and "spec_version" not in spec
    assert spec["optimizer"] == {"restarts": 0, "seed": 0, "gradient_tol": 1e-07, "max_iterations": 500}
    assert spec["compute"]["memory_mib"] == 0.016 and spec["compute"]["batch_file"] is None
    ens = root["ensembles/sk"].attrs.asdict()
    assert ens["computed_reference"]["ground_state"] == 0.763166 and "references" not in ens
    session = root["ensembles/sk/p001"].attrs["timings"]["this_session"]
    assert "passes_reused" in session and "passes_from_cache" not in session
    assert attrs["integrity"]["format_version"] == 1 and "version" not in attrs["integrity"]
    # the renamed store passes its own integrity check; p = 2 ran after the upgrade: SK optimum of
    # Quantum 6, 759 (2022), Table 1
    depths = open_study(path).depths("sk")
    assert [d["p"] for d in depths] == [1, 2] and depths[1]["value"] == pytest.approx(0.4075, abs=5e-5)


def test_a_record_with_the_old_version_key_is_renamed_by_the_next_writer(tmp_path, capsys):
    """Schema-4 stores of the first releases called the integrity record's layout version
    "version" (every other layout version is "format_version"): such a store passes its check on
    open unchanged, and the next writer renames the key, values kept."""
    from leadline.jobs.cli import main
    from leadline.storage import integrity as I

    spec = tmp_path / "v.toml"
    spec.write_text('[study]\nname = "v"\nstore = "v.zarr"\n[depths]\npmax = 1\n[optimizer]\nrestarts = 0\n'
                    '[compute]\nexecutor = "inprocess"\n[[ensemble]]\nlabel = "sk"\nxi = "2:0.5"\n')
    main(["sweep", str(spec), "--quiet"])
    path = tmp_path / "v.zarr"
    root = zarr.open_group(str(path), mode="r+")
    record = root.attrs[I.RECORD]
    assert record["format_version"] == 1 and "version" not in record  # what this release writes
    old = {("version" if k == "format_version" else k): v for k, v in record.items()}
    root.attrs[I.RECORD] = old
    before = _tree(path)
    assert open_study(path).depths("sk")[0]["p"] == 1 and _tree(path) == before  # reads, changes nothing
    capsys.readouterr()
    main(["resume", str(path), "--quiet"])
    assert capsys.readouterr().err == ""
    after = zarr.open_group(str(path), mode="r").attrs[I.RECORD]
    assert after == record
