"""read_points: E57 (merged by pose), PLY, text tables (decimal commas), NPY/NPZ, units, bounded memory,
and one line for every way a scan file can be wrong."""

import numpy as np
import pye57
import pytest
import trimesh
from scipy.spatial.transform import Rotation

import shapes.data._scanfile as scanfile
from conftest import one_line_naming
from shapes.data import UNITS, check_spread, orient_toward, read_points
from shapes.errors import InputError, MeshError


def cloud(n=400, seed=0):
    # float32-exact values: pye57 stores coordinates in single precision
    return (np.random.default_rng(seed).normal(size=(n, 3)) * [0.02, 0.01, 0.005]).astype(np.float32).astype(float)


def write_e57(path, scans):
    """scans: list of (points (N, 3) in the scan's frame, quaternion (w, x, y, z), translation)."""
    with pye57.E57(str(path), mode="w") as e57:  # reference: pye57, the E57 writer read back here
        for points, q, t in scans:
            e57.write_scan_raw({"cartesianX": points[:, 0], "cartesianY": points[:, 1], "cartesianZ": points[:, 2]},
                               rotation=np.asarray(q, dtype=float), translation=np.asarray(t, dtype=float))


# ---------------------------------------------------------------- E57


def test_e57_written_with_pye57_reads_back_identically(tmp_path):
    points = cloud()
    write_e57(tmp_path / "one.e57", [(points, [1, 0, 0, 0], [0, 0, 0])])
    scan = read_points(tmp_path / "one.e57")
    # source: ASTM E2807, coordinates in metres; 1 m = 1000 mm (SI)
    np.testing.assert_array_equal(scan.points, points * 1000.0)
    assert scan.normals is None and not scan.is_mesh and scan.rows == len(points)
    np.testing.assert_array_equal(scan.viewpoint, [0.0, 0.0, 0.0])
    np.testing.assert_array_equal(scan.scan_index, np.zeros(len(points)))


def test_two_e57_scans_with_different_poses_merge_into_one_frame(tmp_path):
    a, b = cloud(300, seed=1), cloud(200, seed=2)
    turn = Rotation.from_euler("zyx", [40.0, -25.0, 10.0], degrees=True)
    x, y, z, w = turn.as_quat()  # scipy gives (x, y, z, w); E57 stores (w, x, y, z)
    t = np.array([1.5, -0.25, 0.75])
    write_e57(tmp_path / "two.e57", [(a, [1, 0, 0, 0], [0, 0, 0]), (b, [w, x, y, z], t)])
    scan = read_points(tmp_path / "two.e57")
    # reference: scipy's Rotation applies the pose, p_file = R p_scan + t (ASTM E2807 pose)
    expected = np.vstack([a, turn.apply(b) + t]) * 1000.0
    np.testing.assert_allclose(scan.points, expected, atol=1e-6)
    np.testing.assert_allclose(scan.sensors, [[0, 0, 0], t * 1000.0], atol=1e-9)
    assert scan.viewpoint is None  # two sensors: no single viewpoint
    assert np.bincount(scan.scan_index).tolist() == [300, 200]
    np.testing.assert_allclose(scan.sensor_of_points()[300], t * 1000.0)
    # the rotation changes the cloud: reading the second scan without its pose would not match
    assert np.abs(scan.points[300:] - (b + t) * 1000.0).max() > 1.0


@pytest.mark.parametrize("content, needle", [
    (b"", r"is empty \(0 bytes\)"),
    (b"ASTM-E57" + bytes(range(256)) * 8, "could not be read as E57"),
])
def test_bad_e57_gives_one_line(tmp_path, content, needle):
    path = tmp_path / "scan.e57"
    path.write_bytes(content)
    with pytest.raises(MeshError, match=needle) as info:
        read_points(path)
    one_line_naming(info, path)


def test_truncated_e57_gives_one_line(tmp_path):
    write_e57(tmp_path / "cut.e57", [(cloud(), [1, 0, 0, 0], [0, 0, 0])])
    data = (tmp_path / "cut.e57").read_bytes()
    (tmp_path / "cut.e57").write_bytes(data[: len(data) // 2])
    with pytest.raises(MeshError, match="could not be read as E57") as info:
        read_points(tmp_path / "cut.e57")
    one_line_naming(info, tmp_path / "cut.e57")


# ---------------------------------------------------------------- PLY


def ply_text(points, normals=None, comment=""):
    props = ["x", "y", "z"] + (["nx", "ny", "nz"] if normals is not None else [])
    rows = points if normals is None else np.hstack([points, normals])
    return ("ply\nformat ascii 1.0\n" + comment + f"element vertex {len(points)}\n"
            + "".join(f"property double {p}\n" for p in props) + "end_header\n"
            + "\n".join(" ".join(repr(float(v)) for v in r) for r in rows) + "\n")


def test_ply_ascii_and_binary_with_and_without_normals(tmp_path):
    points = cloud() * 1000
    normals = np.random.default_rng(3).normal(size=points.shape)
    normals /= np.linalg.norm(normals, axis=1, keepdims=True)
    (tmp_path / "ascii.ply").write_text(ply_text(points, normals, "comment viewpoint 1 2 300\n"))
    scan = read_points(tmp_path / "ascii.ply")
    np.testing.assert_array_equal(scan.points, points)  # repr round-trips a double exactly
    np.testing.assert_allclose(scan.normals, normals, atol=1e-12)
    np.testing.assert_array_equal(scan.viewpoint, [1.0, 2.0, 300.0])
    # reference: trimesh's PLY writer (binary little-endian)
    trimesh.PointCloud(points).export(tmp_path / "binary.ply")
    binary = read_points(tmp_path / "binary.ply")
    np.testing.assert_allclose(binary.points, points, rtol=1e-6)
    assert binary.normals is None and binary.viewpoint is None
    # big-endian, written by hand: the PLY format allows either byte order (source: Turk 1994, "The PLY
    # Polygon File Format": binary_little_endian and binary_big_endian)
    header = (f"ply\nformat binary_big_endian 1.0\nelement vertex {len(points)}\nproperty float x\n"
              "property float y\nproperty float z\nend_header\n").encode()
    (tmp_path / "big.ply").write_bytes(header + points.astype(">f4").tobytes())
    np.testing.assert_array_equal(read_points(tmp_path / "big.ply").points, points.astype(np.float32))


def test_ply_with_faces_is_a_mesh(tmp_path):
    box = trimesh.creation.box(extents=(4.0, 2.0, 1.0))
    box.export(tmp_path / "box.ply")
    scan = read_points(tmp_path / "box.ply", units="in")
    assert scan.is_mesh
    # source: NIST SP 811, 1 in = 25.4 mm exactly
    assert scan.mesh.area == pytest.approx(box.area * 25.4**2, rel=1e-9)


@pytest.mark.parametrize("name, make, needle", [
    ("cut.ply", "truncated", "truncated binary PLY: the header promises 400 vertices"),
    ("short.ply", "short_ascii", "the PLY header promises 500 vertices, found 400 rows"),
    ("huge.ply", "huge", "holds 60,000,000 points; at most 50,000,000"),
    ("noheader.ply", "noend", "has no 'end_header' line"),
    ("novertex.ply", "novertex", "without a 'vertex' element"),
    ("view.ply", "badview", "'comment viewpoint' should give 3 numbers"),
])
def test_bad_ply_gives_one_line(tmp_path, name, make, needle):
    path = tmp_path / name
    points = cloud() * 1000
    head = "ply\nformat binary_little_endian 1.0\nelement vertex {n}\nproperty float x\nproperty float y\nproperty float z\nend_header\n"
    if make == "truncated":
        path.write_bytes(head.format(n=400).encode() + points.astype("<f4").tobytes()[:-30])
    elif make == "short_ascii":
        path.write_text(ply_text(points).replace("element vertex 400", "element vertex 500"))
    elif make == "huge":
        path.write_bytes(head.format(n=60_000_000).encode() + points.astype("<f4").tobytes())
    elif make == "noend":
        path.write_bytes(b"ply\nformat ascii 1.0\nelement vertex 3\n")
    elif make == "novertex":
        path.write_text("ply\nformat ascii 1.0\nelement point 1\nproperty float x\nend_header\n1\n")
    else:
        path.write_text(ply_text(points, comment="comment viewpoint up high\n"))
    with pytest.raises(MeshError, match=needle) as info:
        read_points(path)
    one_line_naming(info, path)


# ---------------------------------------------------------------- text tables


@pytest.mark.parametrize("sep, comma", [(" ", False), ("\t", False), (",", False), (";", False), (", ", False),
                                        (";", True), (" ", True), ("\t", True)])
def test_text_separators_and_decimal_commas(tmp_path, sep, comma):
    points = np.round(cloud() * 1000, 4)
    text = "\n".join(sep.join(f"{v:.4f}" for v in r) for r in points)
    if comma:  # common practice: locales that write 3,2 for 3.2
        text = text.replace(".", ",")
    path = tmp_path / "scan.csv"
    path.write_text("# scanner export\nX Y Z\n" + text + "\n")
    scan = read_points(path)
    np.testing.assert_allclose(scan.points, points, atol=1e-9)
    assert ("decimal commas read" in scan.notes) == comma


def test_the_decimal_comma_example_reads_as_three_values(tmp_path):
    rows = ["-0,1072;-9,1757;3,2", "1,5;2,25;-3", "0,5;-1;2,75"] * 20
    rows = [f"{r};" if i % 2 else r for i, r in enumerate(rows)]  # a trailing separator is harmless
    jitter = np.random.default_rng(0).normal(size=(len(rows), 3)) * 1e-3
    text = "\n".join(";".join(f"{float(v.replace(',', '.')) + d:.4f}".replace(".", ",")
                              for v, d in zip(r.strip(";").split(";"), j)) for r, j in zip(rows, jitter))
    (tmp_path / "eu.csv").write_text(text)
    scan = read_points(tmp_path / "eu.csv")
    assert scan.points.shape == (60, 3)
    assert scan.points[0] == pytest.approx([-0.1072 + jitter[0, 0], -9.1757 + jitter[0, 1], 3.2 + jitter[0, 2]], abs=1e-4)


def test_comma_separated_decimal_commas_are_refused_not_misread(tmp_path):
    path = tmp_path / "ambiguous.csv"
    # '-0,1072,-9,1757,3,2' is three values with decimal commas, or six whole numbers: never misread
    path.write_text("\n".join(",".join(f"{v:.4f}".replace(".", ",") for v in r) for r in cloud() * 1000))
    with pytest.raises(MeshError, match="decimal commas") as info:
        read_points(path)
    one_line_naming(info, path)


def test_six_columns_are_normals_only_when_they_are(tmp_path):
    points = cloud() * 1000
    normals = np.random.default_rng(1).normal(size=points.shape)
    normals /= np.linalg.norm(normals, axis=1, keepdims=True)
    np.savetxt(tmp_path / "normals.xyz", np.hstack([points, normals]), fmt="%.9f")
    scan = read_points(tmp_path / "normals.xyz")
    np.testing.assert_allclose(scan.normals, normals, atol=1e-6)
    colours = np.random.default_rng(2).integers(0, 256, size=points.shape)
    np.savetxt(tmp_path / "colours.xyz", np.hstack([points, colours]), fmt="%.9f")
    scan = read_points(tmp_path / "colours.xyz")
    assert scan.normals is None and any("not unit vectors" in n for n in scan.notes)
    # a header naming nx ny nz wins, and such normals are rescaled to unit length
    (tmp_path / "named.txt").write_text("x y z nx ny nz\n" + "\n".join(
        " ".join(f"{v:.9f}" for v in r) for r in np.hstack([points, 3 * normals])))
    np.testing.assert_allclose(read_points(tmp_path / "named.txt").normals, normals, atol=1e-6)


@pytest.mark.parametrize("name, content, needle", [
    ("two.csv", "x,y\n" + "1,2\n" * 50, "line 2: expected at least 3 columns (x y z), found 2"),
    ("words.xyz", "1 2 3\n4 5 6\n7 eight 9\n", "line 3: expected numbers, found '7 eight 9'"),
    ("ragged.xyz", "".join(f"{i} {i * i % 7} {i % 5}\n" for i in range(40)) + "1 2 3 4\n",
     "line 41: expected 3 columns like line 1, found 4"),
    ("header.txt", "x y z\n", "has a header but no data lines"),
    ("comments.txt", "# nothing\n// here\n", "has no data lines"),
    ("nan.xyz", "".join(f"{i} {i * i % 7} {i % 5}\n" for i in range(40)) + "1 nan 3\n",
     "NaN or inf coordinates (first at row 40)"),
])
def test_bad_text_gives_one_line(tmp_path, name, content, needle):
    path = tmp_path / name
    path.write_text(content)
    with pytest.raises(MeshError, match=None) as info:
        read_points(path)
    assert needle in one_line_naming(info, path)


def test_binary_and_non_utf8_text_are_refused(tmp_path):
    (tmp_path / "renamed.xyz").write_bytes(cloud().tobytes())
    with pytest.raises(MeshError, match="is binary"):
        read_points(tmp_path / "renamed.xyz")
    (tmp_path / "latin1.txt").write_bytes("x y z \xb0\n1 2 3\n".encode("latin-1"))
    with pytest.raises(MeshError, match="not a UTF-8 text file"):
        read_points(tmp_path / "latin1.txt")


# ---------------------------------------------------------------- NPY, NPZ, units


def test_npy_npz_and_units(tmp_path):
    points = cloud() * 1000
    normals = np.tile([0.0, 0.0, 2.0], (len(points), 1))
    np.save(tmp_path / "a.npy", points)
    np.save(tmp_path / "six.npy", np.hstack([points, normals]))
    np.savez_compressed(tmp_path / "a.npz", points=points, normals=normals)
    mm = read_points(tmp_path / "a.npy")
    np.testing.assert_array_equal(mm.points, points)
    # source: NIST SP 811 (2008) Appendix B / 1959 yard and pound agreement: 1 in = 25.4 mm exactly; 1 m = 1000 mm
    assert UNITS == {"mm": 1.0, "m": 1000.0, "in": 25.4}
    np.testing.assert_array_equal(read_points(tmp_path / "a.npy", units="m").points, points * 1000.0)
    np.testing.assert_array_equal(read_points(tmp_path / "a.npy", units="in").points, points * 25.4)
    np.testing.assert_array_equal(read_points(tmp_path / "six.npy").normals, np.tile([0.0, 0.0, 1.0], (len(points), 1)))
    npz = read_points(tmp_path / "a.npz", units="in")
    np.testing.assert_array_equal(npz.points, points * 25.4)
    np.testing.assert_array_equal(npz.normals[:, 2], 1.0)  # normals are directions: no unit scaling
    with pytest.raises(InputError, match="units should be one of mm, m, in"):
        read_points(tmp_path / "a.npy", units="cm")


def test_npz_normals_must_match(tmp_path):
    np.savez(tmp_path / "bad.npz", points=cloud(), normals=np.ones((5, 3)))
    with pytest.raises(MeshError, match=r"'normals' should have one row per point \(400\), got 5"):
        read_points(tmp_path / "bad.npz")
    (tmp_path / "junk.npz").write_bytes(b"PK\x03\x04 not really a zip")
    with pytest.raises(MeshError, match="could not be read as .npz"):
        read_points(tmp_path / "junk.npz")


# ---------------------------------------------------------------- bounded memory


def test_large_files_are_thinned_while_reading_the_same_way_each_time(tmp_path):
    points = np.random.default_rng(0).normal(size=(50_000, 3))
    np.save(tmp_path / "big.npy", points)
    np.savetxt(tmp_path / "big.xyz", points[:20_000], fmt="%.6f")
    scan = read_points(tmp_path / "big.npy", max_points=5_000, seed=3)
    # a binomial(50000, 0.1) count: within 5 standard deviations (sd = 67) of 5000
    assert abs(len(scan.points) - 5_000) < 5 * 67 and scan.rows == 50_000
    assert any("50,000 points thinned to" in n for n in scan.notes)
    # the kept rows are rows of the file, in order
    kept = np.flatnonzero(np.isin(points[:, 0], scan.points[:, 0]))
    np.testing.assert_array_equal(points[kept], scan.points)
    np.testing.assert_array_equal(read_points(tmp_path / "big.npy", max_points=5_000, seed=3).points, scan.points)
    text = read_points(tmp_path / "big.xyz", max_points=2_000, seed=3)
    assert abs(len(text.points) - 2_000) < 5 * 43 and text.rows == 20_000


def test_files_over_the_size_limit_are_refused_before_reading(tmp_path, monkeypatch):
    np.save(tmp_path / "a.npy", cloud())
    monkeypatch.setattr(scanfile, "MAX_FILE_BYTES", 1024)
    with pytest.raises(MeshError, match="at most 0 GiB is read") as info:
        read_points(tmp_path / "a.npy")
    one_line_naming(info, tmp_path / "a.npy")


# ---------------------------------------------------------------- degenerate clouds


@pytest.mark.parametrize("points, needle", [
    (np.zeros((0, 3)), "has no points"),
    (np.array([[1.0, 2.0, 3.0]]), "holds a single point"),
    (np.tile([1.0, 2.0, 3.0], (50, 1)), "all 50 points are identical"),
    (np.random.default_rng(0).normal(size=(20, 3)), "has 20 points; need at least 32"),
    (np.repeat(np.random.default_rng(0).normal(size=(40, 3)), 20, axis=0), "only 40 distinct points among 800 rows"),
    (np.linspace(0, 1, 100)[:, None] * [1.0, 2.0, 3.0], "lie on one line"),
    (np.c_[np.random.default_rng(0).normal(size=(100, 2)), np.full(100, 7.0)] @ Rotation.random(random_state=1).as_matrix().T,
     "lie on one plane"),
])
def test_degenerate_clouds_are_refused(points, needle):
    # closed form: a line has one non-zero singular value, a plane two (reference: numpy.linalg.svd)
    with pytest.raises(MeshError, match=None) as info:
        check_spread(points, "scan file x.xyz")
    assert needle in str(info.value) and "\n" not in str(info.value)


def test_a_thin_but_solid_cloud_is_accepted():
    points = np.random.default_rng(0).normal(size=(200, 3)) * [30.0, 30.0, 0.5]  # a washer-like slab
    check_spread(points, "scan file x.xyz")


def test_orient_toward_turns_each_normal_to_its_sensor():
    points = np.array([[0.0, 0.0, 0.0], [1.0, 0.0, 0.0]])
    normals = np.array([[0.0, 0.0, 1.0], [0.0, 0.0, 1.0]])
    sensors = np.array([[0.0, 0.0, 5.0], [1.0, 0.0, -5.0]])
    # closed form: n . (s - p) >= 0 after turning
    np.testing.assert_array_equal(orient_toward(points, normals, sensors), [[0, 0, 1], [0, 0, -1]])
