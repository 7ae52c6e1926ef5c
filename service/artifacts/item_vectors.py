"""Optional artifact files for scoring large catalogues: the item tables as plain arrays.

The exact step graph (`step.onnx`) holds the embedding and output tables inside its protobuf, so
every worker that opens it keeps a private copy. These files hold the same tables as `.npy`
arrays that the service memory-maps read-only (two workers on one host share the pages), plus
reduced-precision copies of the output vectors for a cheaper first pass over every item:

    features.onnx            the GRU step without the item tables: x float32 [B, E], hidden [L, B, H]
                             -> next_hidden [L, B, H], features float32 [B, D]
    embedding.npy            float32 [n_items, E], input embedding (x = embedding[items])
    item_vectors.npy         float32 [n_items, D], output vectors (exact re-scoring of candidates)
    item_bias.npy            float32 [n_items], output bias
    item_vectors_fp16.npy    float16 [D, n_items], output vectors transposed
    item_vectors_int8.npy    int8 [D, n_items], round(v / scale) in -63..63 per item, transposed
    item_scales.npy          float32 [n_items], max_d |v_jd| / 63 (symmetric per item, common practice;
                             7 bits: see offline/export/onnx_graph.build_candidate_graph)
    candidates_fp16.onnx     approximate scores from the fp16 table -> the best k (see onnx_graph.build_candidate_graph)
    candidates_int8.onnx     the same from the int8 table (packed: see onnx_graph.build_candidate_graph)
    item_vectors_int4.npy    uint8 [n_items, blocks, INT4_BLOCK / 2]: each item's vector in blocks of
                             INT4_BLOCK coordinates (zero-padded to whole blocks), round(v / scale)
                             + 8 in 1..15, two codes a byte, the lower coordinate in the low half:
                             the layout of ONNX Runtime's MatMulNBits operator (com.microsoft domain)
    item_scales_int4.npy     float32 [n_items, blocks], max |v| of the block / 7 (symmetric per block)
    candidates_int4.onnx     approximate scores from the int4 table

The first four are always there; of the reduced copies, those of the precisions the export was
asked for (PRECISION_FILES; int8 by default). Every file is in the manifest's checksums. The
manifest's `item_vectors` section names the precisions present. An artifact without any of these
files is still served, by the exact path.
numpy only.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from service.artifacts.mapped import mapped_array
from service.errors import ArtifactError

FEATURE_GRAPH = "features.onnx"
EMBEDDING = "embedding.npy"
ITEM_VECTORS = "item_vectors.npy"
ITEM_BIAS = "item_bias.npy"
ITEM_VECTORS_FP16 = "item_vectors_fp16.npy"
ITEM_VECTORS_INT8 = "item_vectors_int8.npy"
ITEM_SCALES = "item_scales.npy"
CANDIDATES_FP16 = "candidates_fp16.onnx"
CANDIDATES_INT8 = "candidates_int8.onnx"
ITEM_VECTORS_INT4 = "item_vectors_int4.npy"
ITEM_SCALES_INT4 = "item_scales_int4.npy"
CANDIDATES_INT4 = "candidates_int4.onnx"
ITEM_VECTOR_FILES = (FEATURE_GRAPH, EMBEDDING, ITEM_VECTORS, ITEM_BIAS)  # the feature step and the exact re-scoring
# Each reduced precision's files: an artifact holds those the export was asked for (`cairn export
# --precisions`; by default default_precisions below); exports before int4 hold fp16 and int8.
PRECISION_FILES = {
    "fp16": (ITEM_VECTORS_FP16, CANDIDATES_FP16),
    "int8": (ITEM_VECTORS_INT8, ITEM_SCALES, CANDIDATES_INT8),
    "int4": (ITEM_VECTORS_INT4, ITEM_SCALES_INT4, CANDIDATES_INT4),
}
FEATURE_GRAPH_FORMAT = "cairn-gru-features/1"
CANDIDATE_GRAPH_FORMAT = "cairn-candidates/1"
PRECISIONS = tuple(PRECISION_FILES)
# CAIRN_SCORING=auto leaves exact scoring from REDUCED_FROM items on, and the export writes both
# packed tables from there: below it the exact step is at least as fast (two ONNX Runtime calls
# and a re-scoring cost more than one small pass). bench/catalogue.py measured int4 level with
# exact at 200,000 random items (1.05x the clicks/s at 8 visits), 1.2x at 631,430 trained and 1.4x
# at 1,000,000 random, int8 no faster than exact, on a 2-core AVX2 machine; and the clustered
# index of a trained 105,402-item model at half exact's p99. Packed int8 (a later round, a 2-core
# AVX-512 machine): 2.1x exact's clicks/s at 200,000 random items.
REDUCED_FROM = 100_000  # items: from here CAIRN_SCORING=auto serves a reduced path (below it, exact)
DEFAULT_PRECISIONS = ("int8",)  # what `cairn export` writes unless told, below REDUCED_FROM
LARGE_DEFAULT_PRECISIONS = ("int8", "int4")  # and from there: both packed tables, for the int4+int8 path auto then serves


def default_precisions(n_items: int) -> tuple[str, ...]:
    """The reduced copies an export writes unless told: what CAIRN_SCORING=auto serves at this size
    (int8 alone below REDUCED_FROM, for CAIRN_SCORING=int8; both packed tables from there)."""
    return LARGE_DEFAULT_PRECISIONS if n_items >= REDUCED_FROM else DEFAULT_PRECISIONS


# Precisions whose candidate graph takes the table as its initialisers, replaced by the memory maps
# when the service opens it (ONNX Runtime then packs its own copy for its fast kernels); the others
# are fed the table each call. int8 was fed in artifacts exported before its graph was packed:
# a manifest without `packed` means int4 alone.
PACKED = ("int8", "int4")
PACKED_BEFORE_INT8_WAS = ("int4",)
INT8_LEVELS = 63  # item codes in -63..63
FEATURE_ZERO_POINT = 128  # features go to the int8 candidate graph as uint8 code + 128
INT4_BLOCK = 32  # coordinates per int4 block (one scale each)
INT4_LEVELS = 7  # int4 codes in -7..7, stored + INT4_ZERO_POINT
INT4_ZERO_POINT = 8  # MatMulNBits' zero point for 4 bits when none is given


def int4_blocks(dim: int) -> int:
    """Blocks of INT4_BLOCK coordinates that hold a vector of `dim` (the last one zero-padded)."""
    return -(-dim // INT4_BLOCK)


def item_vectors_manifest(precisions: tuple[str, ...] = DEFAULT_PRECISIONS) -> dict[str, Any]:
    """The manifest's `item_vectors` section, written by the export: the precisions it holds, their
    rules, and `packed`: those whose candidate graph takes its table as initialisers (PACKED)."""
    rules = {
        "int8": f"symmetric per item: scale = max|v| / {INT8_LEVELS}",
        "int4": f"symmetric per block of {INT4_BLOCK} coordinates: scale = max|v| / {INT4_LEVELS}, stored code + {INT4_ZERO_POINT}",
    }
    packed = [p for p in precisions if p in PACKED]
    return {"format": FEATURE_GRAPH_FORMAT, "precisions": list(precisions), "packed": packed, **{p: rules[p] for p in precisions if p in rules}}


@dataclass
class ItemVectors:
    feature_graph: Path
    embedding: np.ndarray  # float32 [n_items, E], read-only memory map
    vectors: np.ndarray  # float32 [n_items, D], read-only memory map
    bias: np.ndarray  # float32 [n_items]
    codes: dict[str, np.ndarray]  # precision -> [D, n_items] (float16 or int8; int4: see the docstring), read-only memory maps; the precisions the artifact holds
    candidate_graphs: dict[str, Path]  # precision -> its candidate graph
    scales: np.ndarray | None = None  # float32 [n_items], the int8 scale of each item, with codes["int8"]
    int4_scales: np.ndarray | None = None  # float32 [n_items, blocks], with codes["int4"]
    packed: frozenset[str] = frozenset(PACKED_BEFORE_INT8_WAS)  # precisions whose graph takes the table as initialisers

    @property
    def n_items(self) -> int:
        return self.vectors.shape[0]


def has_item_vectors(manifest: dict[str, Any]) -> bool:
    files = manifest.get("files")
    return isinstance(manifest.get("item_vectors"), dict) and isinstance(files, dict) and all(f in files for f in ITEM_VECTOR_FILES)


def load_item_vectors(path: Path, manifest: dict[str, Any], n_items: int) -> ItemVectors | None:
    """The arrays of a verified artifact as read-only memory maps, None when it has none;
    ArtifactError when one has the wrong type or shape. Each reduced precision whose files are
    all in the checksums is opened."""
    path = Path(path)
    if not has_item_vectors(manifest):
        return None

    def array(fname: str, dtype: type, ndim: int) -> np.ndarray:
        return mapped_array(path / fname, dtype, ndim)

    embedding = array(EMBEDDING, np.float32, 2)
    vectors = array(ITEM_VECTORS, np.float32, 2)
    bias = array(ITEM_BIAS, np.float32, 1)
    dim = vectors.shape[1]
    expected = {EMBEDDING: (n_items, embedding.shape[1]), ITEM_VECTORS: (n_items, dim), ITEM_BIAS: (n_items,)}
    tables = {EMBEDDING: embedding, ITEM_VECTORS: vectors, ITEM_BIAS: bias}
    out = ItemVectors(feature_graph=path / FEATURE_GRAPH, embedding=embedding, vectors=vectors, bias=np.ascontiguousarray(bias), codes={}, candidate_graphs={})
    held = [p for p, files in PRECISION_FILES.items() if all(f in manifest["files"] for f in files)]
    if "fp16" in held:
        tables[ITEM_VECTORS_FP16] = out.codes["fp16"] = array(ITEM_VECTORS_FP16, np.float16, 2)
        expected[ITEM_VECTORS_FP16] = (dim, n_items)
    if "int8" in held:
        tables[ITEM_VECTORS_INT8] = out.codes["int8"] = array(ITEM_VECTORS_INT8, np.int8, 2)
        tables[ITEM_SCALES] = scales = array(ITEM_SCALES, np.float32, 1)
        expected |= {ITEM_VECTORS_INT8: (dim, n_items), ITEM_SCALES: (n_items,)}
    if "int4" in held:
        tables[ITEM_VECTORS_INT4] = out.codes["int4"] = array(ITEM_VECTORS_INT4, np.uint8, 3)
        tables[ITEM_SCALES_INT4] = out.int4_scales = array(ITEM_SCALES_INT4, np.float32, 2)
        expected |= {ITEM_VECTORS_INT4: (n_items, int4_blocks(dim), INT4_BLOCK // 2), ITEM_SCALES_INT4: (n_items, int4_blocks(dim))}
    for fname, a in tables.items():
        if a.shape != expected[fname]:
            raise ArtifactError(f"{path / fname}: shape {a.shape}, expected {expected[fname]} for {n_items} items")
    if "int8" in held:
        out.scales = np.ascontiguousarray(scales)
    out.candidate_graphs = {p: path / PRECISION_FILES[p][-1] for p in held}
    packed = manifest["item_vectors"].get("packed", PACKED_BEFORE_INT8_WAS)
    if not isinstance(packed, list | tuple) or not set(packed) <= set(PACKED):
        raise ArtifactError(f"{path}: manifest item_vectors.packed is {packed!r}, expected some of {', '.join(PACKED)}")
    out.packed = frozenset(packed)
    return out
