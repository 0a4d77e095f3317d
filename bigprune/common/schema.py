"""What the graph stage stores, shared by every stage that reads it.

Graph stage (``bigprune ingest``), row ``i`` of every array is the node with dense index ``i``
(the node table's row order):

- ``node_id.parquet``: one column ``node_id`` holding the user's ids (int64 or string);
- ``split.npy`` (int8): one of the codes in ``SPLIT_CODES``, ``NO_SPLIT`` for null;
- ``label.npy`` (int64): the class label, ``NO_LABEL`` where unknown;
- ``classes.parquet``: present only when the labels were strings: ``label`` (the class id given
  to each name, in sorted name order) and ``name``;
- ``indptr.npy`` (int64, n + 1) and ``indices.npy`` (int32 or int64): the symmetric adjacency
  in CSR form, rows sorted, no self loops, no repeated edges;
- ``weight.npy`` (float32, nnz): edge weights, present only when the edges had a weight column;
- ``features.npy`` (float32, n x d): the input features (hop 0).

Propagate stage (``bigprune propagate``): ``hop_1.npy`` ... ``hop_K.npy`` (float32, or float16
with ``--dtype float16``; n x d) and ``pagerank.npy`` (float64, n). With ``--restrict`` the last
hops are computed only for the rows later stages read; ``computed_through.npy`` (int8, n) then
holds the last hop computed for each row, and rows not computed hold NaN.
"""
NO_SPLIT = 0
SPLIT_CODES = {"train": 1, "valid": 2, "test": 3}
SPLIT_NAMES = {code: name for name, code in SPLIT_CODES.items()}
NO_LABEL = -1
