"""The job-file reference (`wavesweep keys`), its completeness, and the
physics defaults that `check` prints (issue 12, deliverables 4 and 6)."""
from __future__ import annotations

import copy
import json
import tomllib

import pytest

from wavesweep.job.sweep import MODES, RANGE_KEYS
from wavesweep.cli import main
from wavesweep.errors import JobError
from wavesweep.job import job_from_dict
from wavesweep.job.schemas import (ABSORBER, AXIS, DETECTOR, DETECTOR_POSITION, EVOLVE, GRID, PARTICLE, RECORD,
                                   TOP_LEVEL)
from wavesweep.potentials import REGISTRY
from wavesweep.job.reference import (SWEEP, SWEEP_RANGE, TABLE_DOCS, UNIT_KEYS, default_findings,
                                 physics_defaults, reference, render_text, topics)
from wavesweep.states import PACKET_SCHEMAS, PACKETS
from wavesweep.units import UnitSet

NM_UNITS = {"length": "nm", "energy": "meV", "time": "fs"}

# A 1D electron driven by a field; the keys marked physics=True are left out
# where the test says so.
DRIVEN = {
    "units": NM_UNITS,
    "particle": {"charge": -1.0},
    "grid": {"x": {"min": -200.0, "max": 200.0, "points": 256}},
    "potential": [{"kind": "barrier", "height": 50.0, "width": 4.0},
                  {"kind": "field", "amplitude": 0.5, "omega": 1.5, "duration": 20.0}],
    "packet": {"kind": "gaussian", "center": -50.0, "width": 10.0, "energy": 20.0},
    "evolve": {"dt": 0.5, "duration": 20.0},
}


def _schemas():
    """Every table schema of a job file, by a name for messages."""
    out = {"particle": PARTICLE, "grid": GRID, "grid.axis": AXIS, "evolve": EVOLVE,
           "absorber": ABSORBER, "record": RECORD, "detector": {**DETECTOR, "x": DETECTOR_POSITION},
           "units": UNIT_KEYS, "sweep": SWEEP, "sweep.range": SWEEP_RANGE}
    out.update({f"potential.{k}": cls.parameters for k, cls in REGISTRY.items()})
    out.update({f"packet.{k}": schema for k, schema in PACKET_SCHEMAS.items()})
    return out


# --- completeness: iterates the registries, so a new kind or key without them fails ----------

@pytest.mark.parametrize("kind", sorted(REGISTRY))
def test_every_potential_kind_has_a_formula_and_a_summary(kind):
    cls = REGISTRY[kind]
    assert cls.formula.strip(), f"potential kind {kind!r} has no formula"
    assert "V(" in cls.formula, f"the formula of {kind!r} does not say what V is"
    assert cls.summary.strip(), f"potential kind {kind!r} has no summary"
    # the formula is written in the keys' names: every required key appears in it
    for name, f in cls.parameters.items():
        if f.required:
            assert name in cls.formula, f"{kind}: required key {name!r} is not in the formula"


def test_every_key_of_every_schema_has_a_description():
    missing = [f"{table}.{key}" for table, schema in _schemas().items()
               for key, f in schema.items() if not f.doc.strip()]
    assert not missing, f"keys without a doc: {missing}"


def test_every_table_and_packet_kind_is_described():
    assert set(TABLE_DOCS) == set(TOP_LEVEL)
    assert set(PACKET_SCHEMAS) == set(PACKETS)
    assert all(cls.formula.strip() for cls in PACKETS.values())


def test_physics_marks_sit_on_real_defaults():
    # a key marked physics=True has a value to report when left out
    for table, schema in _schemas().items():
        for key, f in schema.items():
            if f.physics:
                assert not f.required and f.default is not None, f"{table}.{key}"


def test_the_reference_matches_what_validation_accepts():
    # the doc-only schemas describe what the code reads: sweep ranges, [units], [grid]
    assert set(SWEEP_RANGE) == set(RANGE_KEYS)
    assert SWEEP["mode"].choices == MODES and SWEEP["mode"].default == MODES[0]
    for key, f in UNIT_KEYS.items():
        assert getattr(UnitSet.from_table({key: f.default}), key) == f.default
    table = copy.deepcopy(DRIVEN)
    table["grid"].pop("boundary", None)
    job = job_from_dict(table)
    assert job.table["grid"]["boundary"] == GRID["boundary"].default
    radial = job_from_dict({"grid": {"r": {"max": 40.0, "points": 64}},
                            "potential": {"kind": "coulomb", "charge": 1.0},
                            "packet": {"kind": "eigenstate"}, "evolve": {"dt": 0.1, "duration": 1.0}})
    assert radial.table["grid"]["l"] == GRID["l"].default


def test_every_topic_renders():
    for topic, sections in topics().items():
        ref = reference(topic)
        assert [s["topic"] for s in ref["sections"]] == sections
        text = render_text(ref)
        for s in ref["sections"]:
            assert s["title"] in text
            for k in s["keys"]:
                assert k["key"] in text and k["doc"]


# --- the content of a table and a kind -------------------------------------------------

def test_a_table_lists_each_key_with_kind_default_and_choices():
    ref = reference("evolve")
    keys = {k["key"]: k for k in ref["sections"][0]["keys"]}
    assert set(keys) == set(EVOLVE)
    assert keys["dt"]["unit_kind"] == "time" and keys["dt"]["required"] and keys["dt"]["bound"] == "> 0"
    assert keys["scheme"]["default"] == "strang" and "order4" in keys["scheme"]["choices"]
    assert "fs" in ref["unit_kinds"]["time"]["symbols"]
    text = render_text(ref)
    assert "dt" in text and "required" in text and 'default "strang"' in text


def test_the_field_kind_gives_its_formula():
    ref = reference("field")
    (section,) = ref["sections"]
    assert section["title"] == '[[potential]] kind = "field"'
    for piece in ("length gauge", "-q * E(t) * x", "cos(omega (t - start) + phase)", "sin^2(pi s / duration)",
                  "duration spans the whole pulse", "fwhm"):
        assert piece in section["formula"], piece
    keys = {k["key"]: k for k in section["keys"]}
    assert keys["omega"]["required"] and keys["omega"]["unit_kind"] == "frequency"
    assert keys["phase"]["physics"] and keys["envelope"]["choices"] == ["constant", "sin2", "trapezoid",
                                                                       "gaussian"]
    assert "Hz" in ref["unit_kinds"]["frequency"]["symbols"]


def test_a_name_that_is_two_kinds_gives_both():
    assert [s["topic"] for s in reference("gaussian")["sections"]] == ["potential.gaussian", "packet.gaussian"]
    assert [s["topic"] for s in reference("packet.gaussian")["sections"]] == ["packet.gaussian"]


def test_an_unknown_topic_names_the_closest():
    with pytest.raises(JobError) as info:
        reference("barier")
    assert "'barier'" in str(info.value) and "did you mean 'barrier'?" in str(info.value)


def test_keys_command(capsys):
    assert main(["keys", "barrier"]) == 0
    out = capsys.readouterr().out
    assert 'kind = "barrier"' in out and "height" in out and "cell-averaged" in out
    assert main(["keys", "record", "--json"]) == 0
    ref = json.loads(capsys.readouterr().out)
    assert {k["key"] for k in ref["sections"][0]["keys"]} == set(RECORD)
    assert main(["keys"]) == 0
    out = capsys.readouterr().out
    assert all(f"[{name}]" in out or f"[[{name}]]" in out for name in TOP_LEVEL if name != "title")
    assert all(kind in out for kind in REGISTRY)
    assert main(["keys", "frield"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "'frield'" in err and "did you mean 'field'?" in err


# --- no silent physics defaults (issue 12: a field without omega was a 0-frequency pulse) ------

def test_a_field_without_omega_is_refused():
    table = copy.deepcopy(DRIVEN)
    del table["potential"][1]["omega"]
    with pytest.raises(JobError) as info:
        job_from_dict(table)
    assert info.value.field == "potential.1.omega"
    assert "static field" in info.value.message            # says what to give for a static field
    table["potential"][1]["omega"] = 0.0                    # a static field, asked for
    assert job_from_dict(table).table["potential"][1]["omega"] == 0.0


def test_physics_defaults_lists_what_the_job_left_out():
    job = job_from_dict(copy.deepcopy(DRIVEN))
    found = {d.field: d for d in physics_defaults(job)}
    assert found["potential.1.phase"].value == "0.0"
    assert found["potential.1.envelope"].value == '"sin2"'
    assert found["potential.1.start"].value == "0.0 fs"
    assert found["potential.0.center"].value == "0.0 nm"
    assert found["potential.0.smoothing"].value == "0.0 nm"
    assert found["particle.mass"].value == "1.0 m_e"
    assert found["grid.boundary"].value == '"periodic"'
    assert found["packet.direction"].value == "1.0"        # the packet is given by its energy
    assert "carrier phase" in found["potential.1.phase"].doc
    assert "potential.1.omega" not in found and "potential.0.height" not in found
    # given keys are not listed, and a packet given by its momentum has no direction to default
    table = copy.deepcopy(DRIVEN)
    table["potential"][1].update(phase=0.5, envelope="sin2", start=0.0)
    table["packet"] = {"kind": "gaussian", "center": -50.0, "width": 10.0, "momentum": 0.1}
    found = {d.field for d in physics_defaults(job_from_dict(table))}
    assert not {"potential.1.phase", "potential.1.envelope", "potential.1.start", "packet.direction"} & found
    assert "potential.0.center" in found


def test_the_resolved_job_holds_the_physics_defaults():
    job = job_from_dict(copy.deepcopy(DRIVEN))
    text = job.to_toml()
    resolved = tomllib.loads(text)
    assert resolved["potential"][1]["phase"] == 0.0 and resolved["potential"][1]["envelope"] == "sin2"
    assert resolved["potential"][0]["center"] == 0.0 and resolved["particle"]["mass"] == 1.0
    again = job_from_dict(resolved)
    assert physics_defaults(again) == []                    # nothing left to default
    assert again.run_id == job.run_id


def test_default_findings_for_check():
    findings = default_findings(job_from_dict(copy.deepcopy(DRIVEN)))
    phase = next(f for f in findings if f.field == "potential.1.phase")
    assert phase.topic == "defaults" and phase.level == "ok" and phase.values == {"value": "0.0", "number": 0.0}
    assert phase.message.startswith("potential.1.phase = 0.0 by default")


def test_physics_defaults_name_the_implicit_choices():
    # no momentum or energy: at rest; 2D: a barrier acts along the first axis unless told
    table = copy.deepcopy(DRIVEN)
    table["grid"]["y"] = {"min": -100.0, "max": 100.0, "points": 64}
    table["potential"] = [{"kind": "barrier", "height": 50.0, "width": 4.0, "center": 0.0,
                           "smoothing": 0.0}]
    table["packet"] = {"kind": "superposition", "packets": [
        {"center": [-50.0, 0.0], "width": 10.0}, {"center": [50.0, 0.0], "width": 10.0, "momentum": 0.0}]}
    found = {d.field: d.value for d in physics_defaults(job_from_dict(table))}
    assert found["potential.0.axis"] == '"x"'
    assert found["packet.amplitudes"] == "[1.0, 1.0]" and found["packet.phases"] == "[0.0, 0.0]"
    assert found["packet.packets.0.momentum"].startswith("0.0 ")
    assert "packet.packets.1.momentum" not in found and "potential.0.center" not in found
