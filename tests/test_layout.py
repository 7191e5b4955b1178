"""Layout file: validation messages, TOML round trip, frame transforms."""

from __future__ import annotations

import copy
import math

import numpy as np
import pytest

from tbminv.layout import Layout, LayoutError, Measurement, demo_layout_path, load_layout


def base() -> dict:
    return {
        "machine": {"diameter_m": 6.0, "shield_length_m": 9.0, "cutterhead_thickness_m": 1.0},
        "tunnel": {"cover_m": "inf", "lining_resistivity_ohmm": 300.0},
        "electrode": [
            {"label": "T1", "kind": "cutterhead", "axial_m": 0.05, "radius_m": 1.0,
             "angle_deg": 0.0},
            {"label": "S1", "kind": "shield", "axial_m": -2.0, "radius_m": 3.05,
             "angle_deg": 90.0},
            {"label": "W1", "kind": "wall", "chainage_m": 95.0, "radius_m": 3.2,
             "angle_deg": 180.0},
            {"label": "BODY", "kind": "machine"},
            {"label": "R1", "kind": "remote"},
        ],
        "measurement": [{"a": "T1", "b": "R1", "m": "S1", "n": "R1"}],
    }


def test_demo_layout_loads_with_a_few_hundred_quadrupoles():
    layout = load_layout(demo_layout_path())
    kinds = {e.kind for e in layout.electrodes}
    assert kinds == {"cutterhead", "shield", "wall", "remote", "machine"}
    assert 150 <= len(layout.measurements) <= 400


def test_round_trip_toml(tmp_path):
    layout = load_layout(demo_layout_path())
    out = layout.to_toml(tmp_path / "again.toml")
    again = load_layout(out)
    assert again == layout
    assert again.measurements == layout.measurements


def test_round_trip_dict_with_infinite_cover():
    layout = Layout.from_dict(base())
    assert math.isinf(layout.tunnel.cover_m)
    assert Layout.from_dict(layout.to_dict()) == layout


def test_semicolon_pairs_are_accepted(tmp_path):
    p = tmp_path / "l.toml"
    p.write_text('[machine]\ndiameter_m = 6.0\nshield_length_m = 9.0\n'
                 '[[electrode]]\nlabel = "T1"\nkind = "cutterhead"\naxial_m = 0.05\n'
                 '[[electrode]]\nlabel = "R1"\nkind = "remote"\n'
                 '[[electrode]]\nlabel = "BODY"\nkind = "machine"\n'
                 '[[measurement]]\na = "BODY"; b = "R1"; m = "T1"; n = "R1"  # pole\n')
    layout = load_layout(p)
    assert layout.measurements == (Measurement("BODY", "R1", "T1", "R1"),)


@pytest.mark.parametrize(
    ("mutate", "fragments"),
    [
        (lambda d: d["machine"].update(diameter_m=-6.0),
         ["[machine] diameter_m", "-6.0", "> 0"]),
        (lambda d: d["electrode"][0].update(radius_m=3.5),
         ["electrode 'T1'", "radius_m", "inside the machine radius", "<= 3.0"]),
        (lambda d: d["electrode"].append(dict(d["electrode"][0])),
         ["#6", "'T1'", "duplicate label"]),
        (lambda d: d["measurement"].append({"a": "T1", "b": "R1", "m": "X9", "n": "R1"}),
         ["[measurement] #2", "m = 'X9'", "unknown electrode label"]),
        (lambda d: d["measurement"].append({"a": "T1", "b": "R1", "m": "T1", "n": "R1"}),
         ["[measurement] #2", "A = M", "different electrodes"]),
        (lambda d: d["measurement"].append({"a": "T1", "b": "T1", "m": "S1", "n": "R1"}),
         ["[measurement] #2", "A = B"]),
        (lambda d: d["electrode"][1].update(axial_m=-12.0),
         ["electrode 'S1'", "axial_m", "on the shield"]),
        (lambda d: d["electrode"][1].update(radius_m=2.0),
         ["electrode 'S1'", "radius_m", "shield skin"]),
        (lambda d: d["electrode"][2].update(radius_m=1.0),
         ["electrode 'W1'", "radius_m", "tunnel wall"]),
        (lambda d: d["electrode"][0].update(kind="tool"), ["kind = 'tool'", "cutterhead"]),
        (lambda d: d["machine"].update(diameter_m="six"), ["diameter_m = 'six'", "number"]),
        (lambda d: d["machine"].pop("shield_length_m"), ["shield_length_m", "missing"]),
        (lambda d: d["tunnel"].update(cover_m=-1.0), ["[tunnel] cover_m", "> 0"]),
        (lambda d: d["machine"].update(colour="red"), ["[machine]", "unknown key", "colour"]),
        (lambda d: d["electrode"][0].update(axial_m=-0.5),
         ["electrode 'T1'", "axial_m", "ahead of the steel"]),
    ],
)
def test_validation_messages_name_file_table_key(mutate, fragments):
    d = copy.deepcopy(base())
    mutate(d)
    with pytest.raises(LayoutError) as err:
        Layout.from_dict(d, source="site.toml")
    msg = str(err.value)
    assert msg.startswith("site.toml")
    for frag in fragments:
        assert frag in msg, msg


def test_unreadable_files(tmp_path):
    with pytest.raises(LayoutError, match="not found"):
        load_layout(tmp_path / "missing.toml")
    bad = tmp_path / "bad.toml"
    bad.write_text("[machine\n")
    with pytest.raises(LayoutError, match="bad.toml: not valid TOML"):
        load_layout(bad)
    latin = tmp_path / "latin.toml"
    latin.write_bytes("name = 'caf\xe9'\n".encode("latin-1"))
    with pytest.raises(LayoutError, match="not UTF-8"):
        load_layout(latin)


def test_angle_90_is_right_side_minus_y():
    # frame convention: angle from the crown, clockwise looking ahead; y to the left
    layout = Layout.from_dict(base())
    pos = layout.positions_machine(face_chainage_m=100.0)
    s1 = pos["S1"]
    np.testing.assert_allclose(s1, [-2.0, -3.05, 0.0], atol=1e-12)
    np.testing.assert_allclose(pos["T1"], [0.05, 0.0, 1.0], atol=1e-12)  # crown: z = +r


def test_cutterhead_turns_with_logged_angle_shield_does_not():
    layout = Layout.from_dict(base())
    pos = layout.positions_machine(cutterhead_deg=90.0, face_chainage_m=100.0)
    np.testing.assert_allclose(pos["T1"], [0.05, -1.0, 0.0], atol=1e-12)
    np.testing.assert_allclose(pos["S1"], [-2.0, -3.05, 0.0], atol=1e-12)
    cyl = layout.positions_cylindrical(cutterhead_deg=300.0, face_chainage_m=100.0)
    assert cyl["T1"] == pytest.approx((0.05, 1.0, 300.0))
    assert layout.positions_cylindrical(100.0, 400.0)["T1"][2] == pytest.approx(40.0)


def test_positions_take_face_then_angle():
    # all three position functions read (face_chainage_m, cutterhead_deg) in that order;
    # expected values from the frame convention in DEVELOPERS.md (y = -r sin a, z = r cos a)
    layout = Layout.from_dict(base())
    assert layout.positions_cylindrical(100.0, 90.0)["W1"][0] == pytest.approx(-5.0)
    assert layout.positions_cylindrical(100.0, 90.0)["T1"] == pytest.approx((0.05, 1.0, 90.0))
    np.testing.assert_allclose(layout.positions_machine(100.0, 90.0)["T1"], [0.05, -1.0, 0.0],
                               atol=1e-12)
    np.testing.assert_allclose(layout.positions_world(100.0, 90.0)["T1"], [100.05, -1.0, 0.0],
                               atol=1e-12)


def test_world_frame_and_wall_electrodes():
    layout = Layout.from_dict(base())
    world = layout.positions_world(face_chainage_m=100.0, cutterhead_deg=0.0)
    np.testing.assert_allclose(world["T1"], [100.05, 0.0, 1.0], atol=1e-12)
    np.testing.assert_allclose(world["W1"], [95.0, 0.0, -3.2], atol=1e-12)  # 180 deg: invert
    later = layout.positions_world(face_chainage_m=110.0)
    np.testing.assert_allclose(later["W1"], world["W1"])  # fixed in the ground
    assert layout.positions_machine(face_chainage_m=110.0)["W1"][0] == pytest.approx(-15.0)
    assert world["R1"] is None and world["BODY"] is None
    with pytest.raises(ValueError, match="face_chainage_m"):
        layout.positions_machine()


def test_electrode_models():
    layout = Layout.from_dict(base())
    assert layout.electrode("BODY").on_steel
    assert not layout.electrode("T1").on_steel
    assert layout.electrode("R1").at_infinity
    assert layout.electrode("W1").fixed_in_ground


def test_generators():
    d = base()
    d.pop("measurement")
    d["protocol"] = {"generate": ["pole-pole", "machine-pole"]}
    layout = Layout.from_dict(d)
    q = layout.measurements
    # three insulated electrodes: 3 pole-pole pairs and 3 machine poles
    assert len(q) == 6
    assert Measurement("BODY", "R1", "W1", "R1") in q
    assert all(m.b == "R1" and m.n == "R1" for m in q)
