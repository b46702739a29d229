"""Reading meshes and scan files: round trips through trimesh's writers, and one-line errors."""

import struct

import numpy as np
import pytest
import trimesh

from conftest import one_line_naming
from shapes.data import MESH_SUFFIXES, MIN_SCAN_POINTS, SCAN_MESH_POINTS, read_mesh, read_scan
from shapes.errors import MeshError


@pytest.fixture
def part():
    # off the origin and of unequal extents, so a format that moved or swapped axes would show it
    return trimesh.creation.cylinder(radius=1.5, height=4.0, sections=12).apply_translation([1, 2, 3])


# ---------------------------------------------------------------- round trips


@pytest.mark.parametrize("file_type, suffix", [
    ("stl", ".stl"), ("stl_ascii", ".stl"), ("obj", ".obj"), ("ply", ".ply"), ("off", ".off"), ("glb", ".glb"),
])
def test_round_trip_through_trimesh_export(tmp_path, part, file_type, suffix):
    path = tmp_path / f"part{suffix}"
    part.export(path, file_type=file_type)  # reference: trimesh's own writers
    mesh = read_mesh(path)
    assert mesh.area == pytest.approx(part.area, rel=1e-6)
    assert mesh.volume == pytest.approx(part.volume, rel=1e-6)
    np.testing.assert_allclose(mesh.bounds, part.bounds, atol=1e-5)


def test_suffix_is_case_insensitive(tmp_path, part):
    path = tmp_path / "PART.STL"
    part.export(path, file_type="stl")
    assert len(read_mesh(path).faces) == len(part.faces)


def test_glb_scene_is_concatenated(tmp_path):
    a = trimesh.creation.box(extents=(1, 1, 1))
    b = trimesh.creation.icosphere(subdivisions=1, radius=0.5)
    scene = trimesh.Scene()
    scene.add_geometry(a, node_name="a")
    scene.add_geometry(b, node_name="b", transform=trimesh.transformations.translation_matrix([4, 0, 0]))
    path = tmp_path / "scene.glb"
    scene.export(path)
    mesh = read_mesh(path)
    assert mesh.area == pytest.approx(a.area + b.area, rel=1e-6)
    assert mesh.bounds[1, 0] == pytest.approx(4.0 + b.bounds[1, 0], abs=1e-6)  # transform applied


def test_binary_stl_with_trailing_padding_reads(tmp_path, part):
    path = tmp_path / "padded.stl"
    part.export(path, file_type="stl")
    path.write_bytes(path.read_bytes() + b"\0" * 7)  # some exporters pad the end
    assert len(read_mesh(path).faces) == len(part.faces)


# ---------------------------------------------------------------- errors


def test_missing_file(tmp_path):
    path = tmp_path / "nope.stl"
    with pytest.raises(MeshError, match="not found") as info:
        read_mesh(path)
    one_line_naming(info, path)


def test_unknown_suffix_lists_supported(tmp_path):
    path = tmp_path / "part.3mf"
    path.write_bytes(b"PK\x03\x04")
    with pytest.raises(MeshError, match="unsupported suffix") as info:
        read_mesh(path)
    one_line_naming(info, path)
    assert all(s in str(info.value) for s in MESH_SUFFIXES)


@pytest.mark.parametrize("suffix", MESH_SUFFIXES)
def test_empty_file(tmp_path, suffix):
    path = tmp_path / f"empty{suffix}"
    path.write_bytes(b"")
    with pytest.raises(MeshError, match="empty") as info:
        read_mesh(path)
    one_line_naming(info, path)


def test_truncated_binary_stl(tmp_path, part):
    path = tmp_path / "cut.stl"
    part.export(path, file_type="stl")
    data = path.read_bytes()
    # from memory: the binary STL layout of the StereoLithography Interface Specification, an 80-byte
    # header, a little-endian uint32 triangle count, then 50 bytes per triangle; trimesh's writer is checked
    # against it here
    assert len(data) == 84 + 50 * struct.unpack("<I", data[80:84])[0]
    path.write_bytes(data[:-120])
    with pytest.raises(MeshError, match=f"header says {len(part.faces)} triangles") as info:
        read_mesh(path)
    one_line_naming(info, path)
    path.write_bytes(data[:50])  # not even a full header
    with pytest.raises(MeshError, match="truncated"):
        read_mesh(path)


@pytest.mark.parametrize("suffix", [".obj", ".ply", ".off", ".stl"])
def test_nan_vertices(tmp_path, suffix):
    box = trimesh.creation.box()
    vertices = box.vertices.copy()
    vertices[3, 1] = np.nan
    path = tmp_path / f"nan{suffix}"
    trimesh.Trimesh(vertices, box.faces, process=False).export(path)
    with pytest.raises(MeshError, match="NaN or inf") as info:
        read_mesh(path)
    one_line_naming(info, path)


def test_zero_area_mesh(tmp_path):
    path = tmp_path / "flat.obj"
    path.write_text("v 0 0 0\nv 1 0 0\nv 2 0 0\nv 3 0 0\nf 1 2 3\nf 2 3 4\n")  # collinear corners
    with pytest.raises(MeshError, match="zero surface area") as info:
        read_mesh(path)
    one_line_naming(info, path)


def test_no_faces(tmp_path):
    path = tmp_path / "points.obj"
    path.write_text("v 0 0 0\nv 1 0 0\nv 0 1 0\n")
    with pytest.raises(MeshError, match="no faces") as info:
        read_mesh(path)
    one_line_naming(info, path)


@pytest.mark.parametrize("name, content", [
    ("junk.ply", b"\x00\x01 not a ply at all " * 4),
    ("junk.off", b"OFF\n3 1 0\n0 0 0\n1 0\n"),
    ("junk.glb", b"glTF" + b"\x00" * 30),
])
def test_unparsable_file_is_wrapped(tmp_path, name, content):
    path = tmp_path / name
    path.write_bytes(content)
    with pytest.raises(MeshError, match="could not be parsed") as info:
        read_mesh(path)
    one_line_naming(info, path)
    assert info.value.__cause__ is not None  # the parser's own error is kept as the cause


# ---------------------------------------------------------------- read_scan


def cloud(n=100, seed=0):
    return np.random.default_rng(seed).normal(size=(n, 3)) * 10.0


@pytest.mark.parametrize("name, header, sep", [
    ("scan.xyz", "", " "), ("scan.txt", "# exported\nx y z nx ny nz\n", "\t"), ("scan.csv", "x,y,z\n", ","),
])
def test_text_tables(tmp_path, name, header, sep):
    points = cloud()
    extra = np.ones((len(points), 3))  # normals or colour columns after x y z are ignored
    rows = "\n".join(sep.join(f"{v:.9g}" for v in row) for row in np.hstack([points, extra]))
    path = tmp_path / name
    path.write_text(header + rows + "\n")
    np.testing.assert_allclose(read_scan(path), points, rtol=1e-8)


def test_npy_and_point_ply(tmp_path):
    points = cloud()
    np.save(tmp_path / "scan.npy", points)
    np.testing.assert_array_equal(read_scan(tmp_path / "scan.npy"), points)
    trimesh.PointCloud(points).export(tmp_path / "scan.ply")
    np.testing.assert_allclose(read_scan(tmp_path / "scan.ply"), points, rtol=1e-6)


@pytest.mark.parametrize("suffix", [".stl", ".ply", ".obj"])
def test_mesh_file_is_sampled_on_its_surface(tmp_path, suffix):
    box = trimesh.creation.box(extents=(4.0, 2.0, 1.0))
    path = tmp_path / f"part{suffix}"
    box.export(path)
    points = read_scan(path, seed=0)
    assert points.shape == (SCAN_MESH_POINTS, 3)
    # closed form: a point on an axis-aligned box surface has one coordinate at +-half extent
    on_face = np.isclose(np.abs(points), box.extents / 2, atol=1e-9).any(axis=1)
    inside = (np.abs(points) <= box.extents / 2 + 1e-9).all(axis=1)
    assert (on_face & inside).all()
    np.testing.assert_array_equal(read_scan(path, seed=0), points)


def test_scan_errors(tmp_path):
    path = tmp_path / "few.npy"
    np.save(path, cloud(MIN_SCAN_POINTS - 1))
    with pytest.raises(MeshError, match=f"has {MIN_SCAN_POINTS - 1} points; need at least {MIN_SCAN_POINTS}") as info:
        read_scan(path)
    one_line_naming(info, path)
    np.save(path, cloud(MIN_SCAN_POINTS))
    assert read_scan(path).shape == (MIN_SCAN_POINTS, 3)

    bad = cloud()
    bad[5, 2] = np.nan
    path = tmp_path / "nan.npy"
    np.save(path, bad)
    with pytest.raises(MeshError, match="first at row 5"):
        read_scan(path)

    path = tmp_path / "flat.npy"
    np.save(path, cloud()[:, :2])
    with pytest.raises(MeshError, match=r"shape \(N, 3\), got \(100, 2\)"):
        read_scan(path)

    path = tmp_path / "two.csv"
    path.write_text("x,y\n" + "\n".join("1,2" for _ in range(50)))
    with pytest.raises(MeshError, match="line 2: expected at least 3 columns"):
        read_scan(path)

    path = tmp_path / "words.xyz"
    path.write_text("1 2 3\n4 5 6\n7 eight 9\n")
    with pytest.raises(MeshError, match="line 3: expected numbers"):
        read_scan(path)

    path = tmp_path / "empty.xyz"
    path.write_text("")
    with pytest.raises(MeshError, match="empty"):
        read_scan(path)

    path = tmp_path / "scan.las"
    path.write_text("x")
    with pytest.raises(MeshError, match="unsupported suffix"):
        read_scan(path)
