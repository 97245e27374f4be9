"""tripletkit.tables.columns: Arrow columns to validated numpy arrays, with one-line errors."""

import numpy as np
import pyarrow as pa
import pytest

from tripletkit._errors import TripletkitError
from tripletkit.tables import columns as C


def test_id_array_takes_int64_and_strings_only():
    assert C.id_array(np.array([3, 1, 2], np.int32)).type == pa.int64()
    assert C.id_array(np.array(["a", "b"], dtype=object)).to_pylist() == ["a", "b"]
    assert C.id_array(pa.chunked_array([["x"], ["y"]])).to_pylist() == ["x", "y"]
    with pytest.raises(TripletkitError, match=r"^anchor ids have type double; ids are int64 or strings"):
        C.id_array(np.array([0.7, 1.2]), what="anchor ids")
    with pytest.raises(TripletkitError, match=r"have type bool"):
        C.id_array(np.array([True, False]))
    with pytest.raises(TripletkitError, match=r"have 1 null values \(first at row 1\)"):
        C.id_array(pa.array([1, None, 3]))
    with pytest.raises(TripletkitError, match=r"mix integers and strings"):
        C.id_array(np.array([1, "a"], dtype=object))


def test_embedding_matrix_from_fixed_and_uniform_lists():
    ids = np.array([10, 11])
    fixed = pa.FixedSizeListArray.from_arrays(pa.array([1.0, 2.0, 3.0, 4.0], pa.float32()), 2)
    matrix, rescaled = C.embedding_matrix(fixed, "embedding", ids, "")
    assert matrix.dtype == np.float32 and matrix.tolist() == [[1.0, 2.0], [3.0, 4.0]] and rescaled == 0
    uniform = pa.array([[1.0, 2.0], [3.0, 4.0]], pa.list_(pa.float64()))
    assert C.embedding_matrix(uniform, "embedding", ids, "")[0].tolist() == [[1.0, 2.0], [3.0, 4.0]]
    ragged = pa.array([[1.0, 2.0], [3.0]], pa.list_(pa.float32()))
    with pytest.raises(TripletkitError, match=r"rows of length 2 and 1 \(first ragged id: 11\)"):
        C.embedding_matrix(ragged, "embedding", ids, "")


def test_key_values_refuse_nulls_and_floats():
    assert C.key_values(pa.chunked_array([[1, 2]]), "label", "label", "").tolist() == [1, 2]
    with pytest.raises(TripletkitError, match=r"label column 'label' has 1 null values \(first at row 0\); every row needs a label"):
        C.key_values(pa.chunked_array([[None, 2]]), "label", "label", "")
    with pytest.raises(TripletkitError, match=r"has type double; expected int64 or string"):
        C.key_values(pa.chunked_array([[1.5]]), "label", "label", "")


def test_sliced_arrays_give_their_own_rows():
    # Arrow arrays can be views (an offset into shared buffers): the conversion reads from the offset
    x = np.arange(12, dtype=np.float32)
    fixed = pa.FixedSizeListArray.from_arrays(pa.array(x), 3).slice(1, 2)
    assert C.embedding_matrix(fixed, "e", np.array([1, 2]), "")[0].tolist() == [[3, 4, 5], [6, 7, 8]]
    listed = pa.array([[0.0, 1.0], [2.0, 3.0], [4.0, 5.0]], pa.list_(pa.float32())).slice(1, 2)
    assert C.embedding_matrix(listed, "e", np.array([1, 2]), "")[0].tolist() == [[2, 3], [4, 5]]
    ints = pa.array([5, 6, 7], pa.int32()).slice(1)
    assert C.key_values(ints, "id", "id", "").tolist() == [6, 7]
    flags = pa.array([True, False, True, True, False, False, True, False, True]).slice(7)
    assert C.numpy_of(flags).tolist() == [False, True]


def test_uint64_ids_above_int64_are_refused():
    big = pa.array([1, 2**63 + 5], pa.uint64())
    with pytest.raises(TripletkitError, match=r"has uint64 values above 9223372036854775807; store the ids as int64"):
        C.key_values(big, "id", "id", "")
