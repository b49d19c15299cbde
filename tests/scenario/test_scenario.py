"""Tests for largeq.scenario: validation messages, round trip, with_length, fuzzing, examples."""

from __future__ import annotations

import copy
import math
from importlib import resources
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from largeq.scenario.spec import (Scenario, ScenarioError, load_scenario, parse_scenario, scenario_to_dict,
                                  scenario_to_toml)

REPO = Path(__file__).resolve().parents[2]


def base() -> dict:
    """A valid explicit-coupling scenario used as the starting point of mutations."""
    return {
        "title": "test",
        "chain": {"sites": 8, "boundary": "periodic"},
        "coupling": [{"range": 1, "xy": 1.0, "zz": 1.0}, {"range": 2, "xy": 0.3, "zz": 0.3}],
        "field": {"z": {"pattern": "staggered", "strength": 0.5}},
        "start": {"state": "neel"},
        "observe": [
            {"name": "stag", "kind": "sum", "axis": "z", "signs": "staggered"},
            {"name": "m0", "kind": "site", "axis": "z", "site": 0},
            {"name": "zz1", "kind": "zz", "distance": 1},
            {"name": "b01", "kind": "bond", "sites": [0, 1]},
        ],
        "time": {"t_max": 5.0, "points": 11},
    }


def preset_base() -> dict:
    d = base()
    for k in ("coupling", "field"):
        del d[k]
    d["model"] = {"preset": "j1j2_ring", "j2": 0.3}
    return d


def setp(d: dict, path: tuple, value):
    """Set a nested key (tuple of keys/indices); value ``DELETE`` removes it."""
    node = d
    for key in path[:-1]:
        node = node[key]
    if value is DELETE:
        del node[path[-1]]
    else:
        node[path[-1]] = value
    return d


DELETE = object()

# (description, base maker, mutations [(path, value)], expected field path, expected text of the bad value)
BAD = [
    ("negative L", base, [(("chain", "sites"), -4)], "chain.sites", "-4"),
    ("L too large", base, [(("chain", "sites"), 63)], "chain.sites", "63"),
    ("L too small", base, [(("chain", "sites"), 1)], "chain.sites", "1"),
    ("L is bool", base, [(("chain", "sites"), True)], "chain.sites", "True"),
    ("L is float", base, [(("chain", "sites"), 8.0)], "chain.sites", "8.0"),
    ("odd L for neel", base, [(("chain", "sites"), 7), (("field",), DELETE)], "chain.sites", "7"),
    ("odd L staggered field ring", base,
     [(("chain", "sites"), 7), (("start",), {"state": "bits", "bits": "1010101"})], "chain.sites", "7"),
    ("bad boundary", base, [(("chain", "boundary"), "ring")], "chain.boundary", "'ring'"),
    ("unknown top key", base, [(("chains",), {})], "chains", "'chains'"),
    ("unknown chain key", base, [(("chain", "site"), 3)], "chain.site", "'site'"),
    ("coupling nan", base, [(("coupling", 0, "xy"), math.nan)], "coupling[0].xy", "nan"),
    ("coupling inf", base, [(("coupling", 1, "zz"), math.inf)], "coupling[1].zz", "inf"),
    ("coupling bool", base, [(("coupling", 0, "zz"), False)], "coupling[0].zz", "False"),
    ("coupling string", base, [(("coupling", 0, "zz"), "1.0")], "coupling[0].zz", "'1.0'"),
    ("mixing xy and x", base, [(("coupling", 0, "x"), 0.5)], "coupling[0].x", "0.5"),
    ("range too long on ring", base, [(("coupling", 1, "range"), 5)], "coupling[1].range", "5"),
    ("range zero", base, [(("coupling", 1, "range"), 0)], "coupling[1].range", "0"),
    ("bond same site", base, [(("bond",), [{"sites": [2, 2], "xy": 1.0}])], "bond[0].sites", "[2, 2]"),
    ("bond site out of range", base, [(("bond",), [{"sites": [2, 9], "zz": 1.0}])], "bond[0].sites[1]", "9"),
    ("unknown observable kind", base, [(("observe", 0, "kind"), "total")], "observe[0].kind", "'total'"),
    ("unknown axis", base, [(("observe", 1, "axis"), "w")], "observe[1].axis", "'w'"),
    ("site out of range", base, [(("observe", 1, "site"), 8)], "observe[1].site", "8"),
    ("negative site", base, [(("observe", 1, "site"), -1)], "observe[1].site", "-1"),
    ("duplicate names", base, [(("observe", 1, "name"), "stag")], "observe[1].name", "'stag'"),
    ("bad name characters", base, [(("observe", 1, "name"), "m 0")], "observe[1].name", "'m 0'"),
    ("zz key on site kind", base, [(("observe", 1, "distance"), 1)], "observe[1].distance", "'distance'"),
    ("zz distance too long", base, [(("observe", 2, "distance"), 5)], "observe[2].distance", "5"),
    ("bond observable not a bond", base, [(("observe", 3, "sites"), [0, 4])], "observe[3].sites", "[0, 4]"),
    ("sum signs wrong length", base, [(("observe", 0, "signs"), [1.0, -1.0])], "observe[0].signs", "[1.0, -1.0]"),
    ("normalize not bool", base, [(("observe", 0, "normalize"), 1)], "observe[0].normalize", "1"),
    ("no observables", base, [(("observe",), [])], "observe", "[]"),
    ("bits wrong length", base, [(("start",), {"state": "bits", "bits": "1010"})], "start.bits", "'1010'"),
    ("bits wrong chars", base, [(("start",), {"state": "bits", "bits": "1010101x"})], "start.bits", "'1010101x'"),
    ("unknown start", base, [(("start", "state"), "neal")], "start.state", "'neal'"),
    ("theta list wrong length", base, [(("start",), {"state": "tilted", "theta": [0.1, 0.2]})],
     "start.theta", "[0.1, 0.2]"),
    ("both points and step", base, [(("time", "step"), 0.5)], "time.points", "'step': 0.5"),
    ("neither points nor step", base, [(("time", "points"), DELETE)], "time", "{}"),
    ("t_max zero", base, [(("time", "t_max"), 0.0)], "time.t_max", "0.0"),
    ("t_max negative", base, [(("time", "t_max"), -3)], "time.t_max", "-3"),
    ("points too few", base, [(("time", "points"), 1)], "time.points", "1"),
    ("step larger than t_max", base, [(("time", "points"), DELETE), (("time", "step"), 6.0)], "time.step", "6.0"),
    ("sector wrong up count", base, [(("sector",), {"up_spins": 3})], "sector.up_spins", "3"),
    ("sector with x field", base,
     [(("field", "x"), {"pattern": "uniform", "strength": 0.2}), (("sector",), {"up_spins": 4})],
     "sector.up_spins", "4"),
    ("sector with XYZ", base,
     [(("coupling", 0), {"range": 1, "x": 1.0, "y": 0.5, "z": 1.0}), (("sector",), {"up_spins": 4})],
     "sector.up_spins", "4"),
    ("sector with tilted start", base,
     [(("start",), {"state": "tilted", "theta": 1.0}), (("sector",), {"up_spins": 4})], "sector.up_spins", "4"),
    ("sector not auto", base, [(("sector",), {"up_spins": "all"})], "sector.up_spins", "'all'"),
    ("preset plus couplings", preset_base, [(("coupling",), [{"range": 1, "zz": 1.0}])], "coupling", "'range': 1"),
    ("unknown preset", preset_base, [(("model", "preset"), "j1j3_ring")], "model.preset", "'j1j3_ring'"),
    ("unknown preset param", preset_base, [(("model", "delta"), 1.0)], "model.delta", "'delta'"),
    ("preset param nan", preset_base, [(("model", "j2"), math.nan)], "model.j2", "nan"),
    ("random preset without w", preset_base, [(("model",), {"preset": "random_field_heisenberg"})], "model.w", "missing"),
    ("empty hamiltonian", base,
     [(("coupling",), [{"range": 1, "xy": 0.0, "zz": 0.0}]), (("field", "z", "strength"), 0.0)],
     "coupling", "all couplings and fields are zero"),
    ("no terms at all", base, [(("coupling",), DELETE), (("field",), DELETE)], "coupling", "missing"),
    ("random seed negative", base, [(("field", "z"), {"pattern": "random", "strength": 1.0, "seed": -5})],
     "field.z.seed", "-5"),
    ("random W negative", base, [(("field", "z"), {"pattern": "random", "strength": -1.0})],
     "field.z.strength", "-1.0"),
    ("tolerance too big", base, [(("numerics",), {"tolerance": 2.0})], "numerics.tolerance", "2.0"),
    ("unknown method", base, [(("numerics",), {"method": "rk4"})], "numerics.method", "'rk4'"),
    ("preset ring too short for range 2", preset_base,
     [(("chain", "sites"), 2), (("start",), {"state": "bits", "bits": "10"}), (("observe",), [{"name": "a", "kind": "site", "site": 0}])],
     "chain.sites", "2"),
    ("field on unknown axis", base, [(("field", "w"), {"strength": 1.0})], "field.w", "'w'"),
    ("field values with strength", base, [(("field", "x"), {"pattern": "values", "values": [0.0] * 8, "strength": 1.0})],
     "field.x.strength", "1.0"),
    ("huge coupling", base, [(("coupling", 0, "xy"), 1e300)], "coupling[0].xy", "1e+300"),
    ("chain not a table", base, [(("chain",), 8)], "chain", "8"),
    ("title not text", base, [(("title",), 3)], "title", "3"),
]


@pytest.mark.parametrize("what,maker,mutations,path,shown", BAD, ids=[b[0] for b in BAD])
def test_malformed_scenarios_name_path_and_value(what, maker, mutations, path, shown):
    d = maker()
    for p, v in mutations:
        setp(d, p, v)
    with pytest.raises(ScenarioError) as info:
        parse_scenario(d)
    err = info.value
    assert err.path == path, str(err)
    msg = str(err)
    assert f"'{path}'" in msg
    assert shown in msg, msg
    assert "allowed:" in msg


def test_error_message_format_example():
    d = base()
    d["chain"]["sites"] = -4
    with pytest.raises(ScenarioError, match=r"scenario field 'chain.sites': got -4; allowed: an integer between 2 and 62"):
        parse_scenario(d)


def test_error_pickles():
    import pickle

    err = ScenarioError("chain.sites", -4, "an integer between 2 and 62", "x.toml")
    back = pickle.loads(pickle.dumps(err))
    assert str(back) == str(err) and back.path == "chain.sites"


def test_unknown_key_suggests_close_match():
    d = base()
    d["observe"][0]["signz"] = "uniform"
    with pytest.raises(ScenarioError) as info:
        parse_scenario(d)
    assert "did you mean 'signs'" in str(info.value)
    assert "normalize" in str(info.value)  # the allowed keys are listed


def test_valid_base_parses():
    s = parse_scenario(base())
    assert isinstance(s, Scenario)
    assert s.n_sites == 8 and s.chain.periodic
    assert [o.name for o in s.observables] == ["stag", "m0", "zz1", "b01"]
    assert s.time.n_points == 11
    np.testing.assert_allclose(s.time.times(), np.linspace(0, 5, 11))


def test_step_grid():
    d = base()
    del d["time"]["points"]
    d["time"]["step"] = 0.1
    s = parse_scenario(d)
    assert s.time.n_points == 51
    assert s.time.times()[-1] == pytest.approx(5.0)


def test_preset_expands_like_explicit_couplings():
    a = parse_scenario(preset_base())
    d = base()
    del d["field"]
    b = parse_scenario(d)
    assert a.couplings == b.couplings
    assert a.fields == b.fields == ()
    assert a.model is not None and a.model.param("j2") == 0.3


def test_mixed_field_ising_translation_to_s_units():
    d = preset_base()
    d["model"] = {"preset": "mixed_field_ising", "j": 0.7, "g": 0.2, "h": -0.3}
    d["observe"] = [{"name": "m", "kind": "site", "site": 0}]
    s = parse_scenario(d)
    (c,) = s.couplings
    assert (c.range, c.x, c.y, c.z) == (1, 0.0, 0.0, pytest.approx(2.8))
    fv = s.field_values()
    np.testing.assert_allclose(fv["x"], 0.4)
    np.testing.assert_allclose(fv["z"], -0.6)


def test_random_seed_drawn_and_recorded():
    d = base()
    d["field"] = {"z": {"pattern": "random", "strength": 2.0}}
    s = parse_scenario(d)
    (f,) = s.fields
    assert isinstance(f.seed, int)
    h = s.field_values()["z"]
    assert np.all(np.abs(h) <= 2.0) and np.ptp(h) > 0
    # reloading the written text reproduces the same fields
    s2 = parse_scenario(scenario_to_dict(s))
    np.testing.assert_array_equal(s2.field_values()["z"], h)


def test_random_preset_seed_recorded():
    d = preset_base()
    d["model"] = {"preset": "random_field_heisenberg", "w": 3.0}
    d["observe"] = [{"name": "m", "kind": "site", "site": 0}]
    s = parse_scenario(d)
    seed = s.model.param("seed")
    assert isinstance(seed, int) and s.fields[0].seed == seed
    np.testing.assert_array_equal(parse_scenario(scenario_to_dict(s)).field_values()["z"], s.field_values()["z"])


ROUND_TRIP_CASES = {
    "explicit": base,
    "preset": preset_base,
}


@pytest.mark.parametrize("name", list(ROUND_TRIP_CASES))
def test_round_trip_toml(name, tmp_path):
    s = parse_scenario(ROUND_TRIP_CASES[name]())
    text = scenario_to_toml(s)
    f = tmp_path / "s.toml"
    f.write_text(text)
    s2 = load_scenario(f)
    assert s2 == s
    assert scenario_to_toml(s2) == text


def test_round_trip_rich_scenario():
    d = base()
    d["chain"]["boundary"] = "open"
    d["coupling"] = [{"range": 1, "x": 1.0, "y": 0.7, "z": 0.2}]
    d["bond"] = [{"sites": [0, 5], "zz": 0.4}]
    d["field"] = {"x": {"pattern": "values", "values": [0.1 * j for j in range(8)]},
                  "z": {"pattern": "random", "strength": 1.0, "seed": 7}}
    d["start"] = {"state": "tilted", "theta": [0.1 * j for j in range(8)], "phi": 0.3}
    d["observe"][0]["signs"] = [1.0, 2.0, 0.0, 0.0, -1.0, 0.0, 0.0, 0.5]
    d["observe"][0]["normalize"] = False
    d["observe"][2] = {"name": "zz1", "kind": "zz", "distance": 2, "site": 3}
    d["sector"] = {"up_spins": "auto"}
    d["numerics"] = {"tolerance": 1e-8, "method": "lanczos", "checkpoint_seconds": 60}
    s = parse_scenario(d)
    assert parse_scenario(scenario_to_dict(s)) == s
    import tomllib
    assert parse_scenario(tomllib.loads(scenario_to_toml(s))) == s


def test_with_length_scales_patterns():
    s = parse_scenario(base())
    s12 = s.with_length(12)
    assert s12.n_sites == 12
    assert s12.start.basis_bits(12) == 0b010101010101
    np.testing.assert_allclose(s12.field_values()["z"], 0.5 * (-1.0) ** np.arange(12))
    assert s12.observables == s.observables
    assert s12.with_length(8) == s


def test_with_length_rederives_sector():
    d = base()
    d["sector"] = {"up_spins": 4}
    s = parse_scenario(d).with_length(10)
    assert s.sector.up_spins == 5


@pytest.mark.parametrize("mutation,path", [
    ((("start",), {"state": "bits", "bits": "10101010"}), "start.bits"),
    ((("bond",), [{"sites": [0, 4], "zz": 1.0}]), "bond"),
    ((("start",), {"state": "tilted", "theta": [0.5] * 8}), "start.theta"),
    ((("observe", 0, "signs"), [1.0] * 8), "observe[0].signs"),
    ((("field", "z"), {"pattern": "values", "values": [0.5] * 8}), "field.z.values"),
])
def test_with_length_refuses_explicit_lists(mutation, path):
    d = base()
    setp(d, *mutation)
    s = parse_scenario(d)
    with pytest.raises(ScenarioError) as info:
        s.with_length(10)
    assert info.value.path == path


def test_with_length_invalid_length_is_scenario_error():
    s = parse_scenario(base())
    with pytest.raises(ScenarioError) as info:
        s.with_length(9)  # Néel needs even L
    assert info.value.path == "chain.sites"
    with pytest.raises(ScenarioError):
        s.with_length(100)


def test_ring_range_half_and_two_sites():
    d = base()
    d["chain"]["sites"] = 2
    d["coupling"] = [{"range": 1, "xy": 1.0, "zz": 1.0}]
    del d["field"]
    d["observe"] = [{"name": "b", "kind": "bond", "sites": [1, 0]}]
    s = parse_scenario(d)
    assert s.resolved_bonds() == [(0, 1, 1.0, 1.0, 1.0)]
    d = base()
    d["coupling"] = [{"range": 4, "zz": 1.0}]
    d["observe"] = d["observe"][:3]
    pairs = [(i, j) for i, j, *_ in parse_scenario(d).resolved_bonds()]
    assert pairs == [(0, 4), (1, 5), (2, 6), (3, 7)]


def test_missing_file_and_bad_toml(tmp_path):
    with pytest.raises(ScenarioError):
        load_scenario(tmp_path / "nope.toml")
    f = tmp_path / "bad.toml"
    f.write_text("[chain\nsites = 3")
    with pytest.raises(ScenarioError) as info:
        load_scenario(f)
    assert str(f) in str(info.value)


# ------------------------------------------------------------------------ examples
EXAMPLE_NAMES = sorted(p.name for p in (REPO / "largeq" / "scenario" / "builtin").glob("*.toml"))


@pytest.mark.parametrize("name", EXAMPLE_NAMES)
def test_examples_load_and_copies_agree(name):
    packaged = resources.files("largeq.scenario") / "builtin" / name
    with resources.as_file(packaged) as p:
        s = load_scenario(p)
    assert s.title
    user_copy = REPO / "examples" / name
    assert load_scenario(user_copy) == s
    assert parse_scenario(scenario_to_dict(s)) == s


def test_main_example_content():
    with resources.as_file(resources.files("largeq.scenario") / "builtin" / "neel_j1j2.toml") as p:
        s = load_scenario(p)
    assert s.n_sites == 16 and s.model.name == "j1j2_ring" and s.model.param("j2") == 0.3
    assert s.time.n_points == 201 and s.time.t_max == 20.0
    assert {o.kind for o in s.observables} == {"sum", "site", "zz", "bond"}


# ------------------------------------------------------------------------ fuzzing
_atoms = st.one_of(
    st.none(), st.booleans(), st.integers(min_value=-(2**70), max_value=2**70),
    st.floats(allow_nan=True, allow_infinity=True), st.text(max_size=6),
    st.sampled_from(["neel", "z", "x", "sum", "zz", "bond", "site", "auto", "periodic", "open",
                     "staggered", "uniform", "random", "tilted", "bits", "1010", "j1j2_ring"]),
)
_values = st.recursive(
    _atoms,
    lambda inner: st.one_of(st.lists(inner, max_size=4),
                            st.dictionaries(st.text(max_size=8), inner, max_size=4)),
    max_leaves=12,
)
_KEYS = ["title", "chain", "sites", "boundary", "model", "preset", "coupling", "range", "xy", "zz", "x",
         "y", "z", "bond", "field", "pattern", "strength", "seed", "values", "start", "state", "bits",
         "theta", "phi", "observe", "name", "kind", "axis", "site", "signs", "normalize", "distance",
         "time", "t_max", "points", "step", "sector", "up_spins", "numerics", "tolerance", "method"]


def _paths(d, prefix=()):
    out = [prefix] if prefix else []
    if isinstance(d, dict):
        for k, v in d.items():
            out += _paths(v, prefix + (k,))
    elif isinstance(d, list):
        for i, v in enumerate(d):
            out += _paths(v, prefix + (i,))
    return out


def _check_parse(d):
    try:
        s = parse_scenario(d)
    except ScenarioError as exc:
        assert "scenario field '" in str(exc)
        return
    assert isinstance(s, Scenario)
    assert parse_scenario(scenario_to_dict(s)) == s


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.dictionaries(st.sampled_from(_KEYS) | st.text(max_size=5), _values, max_size=6))
def test_fuzz_random_dicts(d):
    _check_parse(d)


@settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(data=st.data())
def test_fuzz_mutations_of_valid_scenario(data):
    d = copy.deepcopy(data.draw(st.sampled_from([base(), preset_base()])))
    for _ in range(data.draw(st.integers(1, 3))):
        paths = _paths(d)
        path = data.draw(st.sampled_from(paths))
        action = data.draw(st.sampled_from(["replace", "delete", "add"]))
        parent = d
        for k in path[:-1]:
            parent = parent[k]
        if action == "delete":
            del parent[path[-1]]
        elif action == "replace":
            parent[path[-1]] = data.draw(_values)
        else:
            target = parent[path[-1]]
            if isinstance(target, dict):
                target[data.draw(st.sampled_from(_KEYS))] = data.draw(_values)
            elif isinstance(target, list):
                target.append(data.draw(_values))
        if not isinstance(d, dict):
            break
    _check_parse(d)
