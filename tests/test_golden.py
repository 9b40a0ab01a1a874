"""Bundle storage: round trip, and every way a bundle can be unsafe or damaged is refused."""
import hashlib
import json
import os
import re
from pathlib import Path

import numpy as np
import pytest

import refops
from refops.golden import MANIFEST, SCHEMA_VERSION, BundleError, read_bundle, write_bundle

MANIFEST_FIELDS = {"config": {"kernel_size": (3, 3), "stride": 2}, "formats": {"input": "bfloat16"},
                   "device": "invented-npu-7 rev B", "seed": 1234,
                   "errors": {"output": 0.5, "input": 0.25}}


def sample_arrays():
    # Values encode their position (10*i + j) so a swapped or shifted array is visible.
    return {"input": np.add.outer(10.0 * np.arange(3), np.arange(4)),
            "weight": np.arange(6, dtype=np.float32).reshape(2, 3) - 2.5,
            "target": np.array([2, 0, 1], dtype=np.int64),
            "mask": np.array([True, False]),
            "loss": np.array(0.125),
            "empty": np.zeros((0, 3))}


@pytest.fixture
def bundle(tmp_path):
    return write_bundle(tmp_path / "case-7", arrays=sample_arrays(), manifest=MANIFEST_FIELDS)


def manifest_of(directory):
    return json.loads((directory / MANIFEST).read_text())


def rewrite_manifest(directory, change):
    manifest = manifest_of(directory)
    change(manifest)
    (directory / MANIFEST).write_text(json.dumps(manifest))


def rehash(directory, name):
    """Record a file's present size and hash, as someone who also edits the manifest would."""
    data = (directory / f"{name}.npy").read_bytes()

    def change(manifest):
        manifest["arrays"][name].update(bytes=len(data), sha256=hashlib.sha256(data).hexdigest())
    rewrite_manifest(directory, change)


def refused(directory, *fragments):
    with pytest.raises(BundleError) as caught:
        read_bundle(directory)
    for fragment in fragments:
        assert fragment in str(caught.value), str(caught.value)
    return str(caught.value)


# ---------------------------------------------------------------------------------------------
# round trip

def test_round_trip_keeps_values_dtypes_and_shapes(bundle):
    back = read_bundle(bundle)
    assert set(back.arrays) == set(sample_arrays())
    for name, array in sample_arrays().items():
        np.testing.assert_array_equal(back.arrays[name], array)
        assert back.arrays[name].dtype == array.dtype and back.arrays[name].shape == array.shape
        assert not back.arrays[name].flags.writeable
    assert back.arrays["input"][2, 3] == 23.0


def test_manifest_records_what_a_replay_needs(bundle):
    back = read_bundle(bundle)
    assert back.schema_version == SCHEMA_VERSION
    assert back.manifest["schema"] == "refops.bundle"
    assert back.config == {"kernel_size": [3, 3], "stride": 2}   # JSON: tuples become lists
    assert back.manifest["device"] == "invented-npu-7 rev B" and back.manifest["seed"] == 1234
    assert back.manifest["formats"] == {"input": "bfloat16"}
    assert back.errors == {"output": 0.5, "input": 0.25}
    libraries = back.manifest["libraries"]
    assert libraries["numpy"] == np.__version__ and libraries["refops"] == refops.__version__
    assert libraries["torch"] is not None    # installed in the test environment, not imported


def test_files_are_plain_npy_with_the_recorded_sha256(bundle):
    entries = manifest_of(bundle)["arrays"]
    files = sorted(p.name for p in bundle.iterdir())
    assert files == sorted([MANIFEST] + [f"{n}.npy" for n in entries])
    for name, entry in entries.items():
        data = (bundle / entry["file"]).read_bytes()
        # Reference: hashlib.sha256 and numpy.load read the files independently of refops.
        assert entry["sha256"] == hashlib.sha256(data).hexdigest()
        np.testing.assert_array_equal(np.load(bundle / entry["file"], allow_pickle=False),
                                      sample_arrays()[name])


def test_numpy_scalars_in_the_manifest_are_stored_as_numbers(tmp_path):
    fields = {**MANIFEST_FIELDS, "seed": np.int64(5), "config": {"eps": np.float32(0.5)}}
    back = read_bundle(write_bundle(tmp_path / "b", arrays={}, manifest=fields))
    assert back.manifest["seed"] == 5 and back.config == {"eps": 0.5}


def test_a_newer_minor_version_with_unknown_keys_is_read(bundle):
    rewrite_manifest(bundle, lambda m: m.update(schema_version="1.7", added_later={"x": 1}))
    assert read_bundle(bundle).manifest["added_later"] == {"x": 1}


# ---------------------------------------------------------------------------------------------
# refusals: each names the file at fault

def test_tampered_array_is_refused(bundle):
    path = bundle / "input.npy"
    data = bytearray(path.read_bytes())
    data[-1] ^= 0x01                        # same size, one bit of one value changed
    path.write_bytes(bytes(data))
    refused(bundle, str(path), "SHA-256 mismatch")


def test_truncated_array_is_refused(bundle):
    path = bundle / "weight.npy"
    path.write_bytes(path.read_bytes()[:50])
    refused(bundle, str(path), "truncated: 50 bytes")


def test_truncated_array_with_a_matching_manifest_is_refused(bundle):
    path = bundle / "weight.npy"
    path.write_bytes(path.read_bytes()[:-4])
    rehash(bundle, "weight")
    refused(bundle, str(path), "not a valid .npy file")


def test_missing_array_is_refused(bundle):
    (bundle / "target.npy").unlink()
    refused(bundle, str(bundle / "target.npy"), "missing")


def test_missing_manifest_is_refused(bundle):
    (bundle / MANIFEST).unlink()
    refused(bundle, str(bundle / MANIFEST), "missing")


def test_unexpected_file_is_refused(bundle):
    (bundle / "notes.txt").write_text("extra")
    refused(bundle, str(bundle / "notes.txt"), "unexpected file")


class _Trap:
    """Unpickling this would create a file: proof that nothing in a bundle is executed."""

    def __init__(self, marker):
        self.marker = str(marker)

    def __reduce__(self):
        return (Path.touch, (Path(self.marker),))


def test_pickled_object_array_is_refused_and_never_unpickled(bundle, tmp_path):
    marker = tmp_path / "unpickled"
    path = bundle / "input.npy"
    np.save(path, np.array([_Trap(marker), 1], dtype=object), allow_pickle=True)
    rehash(bundle, "input")
    refused(bundle, str(path), "pickled (object) array")
    assert not marker.exists()


def test_structured_array_is_refused(bundle):
    path = bundle / "target.npy"
    np.save(path, np.zeros(3, dtype=[("a", "<f8"), ("b", "<i4")]), allow_pickle=False)
    rehash(bundle, "target")
    refused(bundle, str(path), "numeric arrays only")


def test_dtype_or_shape_other_than_recorded_is_refused(bundle):
    path = bundle / "weight.npy"
    np.save(path, np.zeros((3, 2), dtype=np.float32), allow_pickle=False)
    rehash(bundle, "weight")
    refused(bundle, str(path), "shape [3, 2]", "shape [2, 3]")


def test_wrong_schema_is_refused(bundle):
    rewrite_manifest(bundle, lambda m: m.update(schema="some.other.format"))
    refused(bundle, str(bundle / MANIFEST), "schema='some.other.format'")


@pytest.mark.parametrize("version", ["2.0", "10.3"])
def test_newer_major_version_is_refused(bundle, version):
    rewrite_manifest(bundle, lambda m: m.update(schema_version=version))
    refused(bundle, str(bundle / MANIFEST), f"schema_version={version!r}", "newer refops")


@pytest.mark.parametrize("version", ["1", "v1.0", 1.0, None, "0.9"])
def test_malformed_version_is_refused(bundle, version):
    rewrite_manifest(bundle, lambda m: m.update(schema_version=version))
    refused(bundle, str(bundle / MANIFEST), "schema_version=")


def test_manifest_that_is_not_json_is_refused(bundle):
    (bundle / MANIFEST).write_text("{'schema': 'refops.bundle'")
    refused(bundle, str(bundle / MANIFEST), "not valid JSON")


@pytest.mark.parametrize("name", ["../x", "sub/x", "..", ".hidden", "/etc/passwd"])
def test_traversal_name_in_manifest_is_refused(bundle, name):
    def change(manifest):
        manifest["arrays"][name] = {**manifest["arrays"].pop("input"), "file": f"{name}.npy"}
    rewrite_manifest(bundle, change)
    refused(bundle, str(bundle / MANIFEST), repr(name))


def test_entry_pointing_at_another_file_is_refused(bundle):
    rewrite_manifest(bundle, lambda m: m["arrays"]["input"].update(file="weight.npy"))
    refused(bundle, str(bundle / MANIFEST), "must be stored in 'input.npy'")


@pytest.mark.skipif(not hasattr(os, "symlink"), reason="no symbolic links on this system")
def test_symbolic_link_is_refused(bundle, tmp_path):
    outside = tmp_path / "outside.npy"
    (bundle / "input.npy").rename(outside)
    (bundle / "input.npy").symlink_to(outside)
    refused(bundle, str(bundle / "input.npy"), "not a regular file")


def test_directory_that_does_not_exist_is_refused(tmp_path):
    refused(tmp_path / "nowhere", str(tmp_path / "nowhere"), "no such bundle directory")


# ---------------------------------------------------------------------------------------------
# bad arguments to write_bundle, one table

def _object_array():
    return np.array([{}, 1], dtype=object)


BAD_WRITES = [
    ("directory-not-a-path", dict(directory=3), TypeError, r"directory=3: expected a path"),
    ("arrays-not-a-mapping", dict(arrays=[np.zeros(2)]), TypeError,
     r"arrays=\[.*\]: expected a mapping"),
    ("array-not-an-array", dict(arrays={"input": [1.0, 2.0]}), TypeError,
     r"arrays\['input'\]=\[1.0, 2.0\]: expected a numpy array, got list"),
    ("object-array", dict(arrays={"input": _object_array()}), TypeError,
     r"arrays\['input'\]=array\(shape=\(2,\), dtype=object\): expected a numeric dtype"),
    ("string-array", dict(arrays={"input": np.array(["a"])}), TypeError,
     r"expected a numeric dtype"),
    ("traversal-name", dict(arrays={"../x": np.zeros(2)}), ValueError,
     r"arrays\['../x'\]='../x': an array name is letters"),
    ("separator-name", dict(arrays={"a/b": np.zeros(2)}), ValueError, r"no path separators"),
    ("empty-name", dict(arrays={"": np.zeros(2)}), ValueError, r"arrays\[''\]=''"),
    ("name-not-str", dict(arrays={3: np.zeros(2)}), TypeError, r"must be a str, got int"),
    ("names-differ-in-case", dict(arrays={"grad": np.zeros(1), "Grad": np.zeros(1)}), ValueError,
     r"'grad' and 'Grad' differ only in case"),
    ("manifest-not-a-mapping", dict(manifest=["config"]), TypeError,
     r"manifest=\['config'\]: expected a mapping"),
    ("manifest-lacks-seed",
     dict(manifest={k: v for k, v in MANIFEST_FIELDS.items() if k != "seed"}), ValueError,
     r"lacks the key 'seed'"),
    ("manifest-reserved-key", dict(manifest={**MANIFEST_FIELDS, "arrays": {}}), ValueError,
     r"the key 'arrays' is written by refops"),
    ("manifest-nan", dict(manifest={**MANIFEST_FIELDS, "errors": {"output": float("nan")}}),
     ValueError, r"must be JSON data \(no NaN or infinity\)"),
    ("manifest-unserialisable", dict(manifest={**MANIFEST_FIELDS, "config": {"f": print}}),
     ValueError, r"must be JSON data.*builtin_function_or_method"),
    ("errors-not-a-mapping", dict(manifest={**MANIFEST_FIELDS, "errors": [0.5]}), TypeError,
     r"manifest\['errors'\]=\[0.5\]: expected a mapping"),
]


@pytest.mark.parametrize("override, kind, message", [row[1:] for row in BAD_WRITES],
                         ids=[row[0] for row in BAD_WRITES])
def test_bad_write_arguments_are_named(tmp_path, override, kind, message):
    call = dict(directory=tmp_path / "b", arrays={"input": np.zeros(2)}, manifest=MANIFEST_FIELDS)
    call.update(override)
    with pytest.raises(kind, match=message):
        write_bundle(call.pop("directory"), **call)
    assert not (tmp_path / "b").exists()      # nothing is written before every check passed


def test_writing_over_an_existing_bundle_is_refused(bundle):
    with pytest.raises(ValueError, match=re.escape(f"directory={str(bundle)!r}: must not exist")):
        write_bundle(bundle, arrays={}, manifest=MANIFEST_FIELDS)
    assert read_bundle(bundle).arrays.keys() == sample_arrays().keys()
