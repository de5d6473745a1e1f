"""Reading and checking rtemu ONNX bundles (one self-describing file per emulator).

A bundle is an ONNX model whose ``metadata_props`` carry everything needed to use and audit
it (keys prefixed ``rtemu.``, see :data:`REQUIRED_KEYS`). :func:`read_bundle` refuses, with
a :class:`BundleError` (a ValueError) that says why, any file that is truncated or
corrupted, not made by rtemu, written by a newer rtemu format, inconsistent, split over
external data files (a bundle is one file), with metadata of unreasonable size, or whose
weights, graph or metadata do not match the SHA-256 digests stored at export.
No code-executing format is involved: the file is protobuf, the metadata JSON and TOML.

What the digests prove: they are unkeyed, so they detect corruption (a damaged download,
a truncated copy, a flipped bit), not authorship: anyone can edit a bundle and recompute
them. Authorship needs a secret: :func:`sign_bundle` adds an HMAC-SHA256 signature with
a key file, and ``read_bundle(path, key=...)`` verifies it (``rtemu sign``, ``rtemu info
--key``, ``EmulatedOperator.load(path, key=...)``).
"""

from __future__ import annotations

import dataclasses
import hashlib
import hmac
import json
import os
from pathlib import Path

import numpy as np
import onnx
from onnx import numpy_helper

from rtemu import _graph
from rtemu.instrument import Instrument
from rtemu.teacher import PHYSICS_TEACHER

__all__ = ["FORMAT_VERSION", "Bundle", "BundleError", "read_bundle", "describe", "make_session",
           "weights_sha256", "sign_bundle", "SIGNATURE_KEY"]

#: Bundle format written by this rtemu; files with a larger number are refused.
FORMAT_VERSION = 7
#: The rtemu release that introduced :data:`FORMAT_VERSION`; older formats are refused.
FORMAT_SINCE = "0.2.0"
PREFIX = "rtemu."

REQUIRED_KEYS = (
    "rtemu.format_version",
    "rtemu.version",
    "rtemu.created",
    "rtemu.instrument_toml",
    "rtemu.channels",
    "rtemu.pressure_hpa",
    "rtemu.inputs",
    "rtemu.outputs",
    "rtemu.graph",
    "rtemu.features",
    "rtemu.envelope",
    "rtemu.flag_thresholds",
    "rtemu.flag_meanings",
    "rtemu.channel_stats",
    "rtemu.recipe_name",
    "rtemu.recipe_toml",
    "rtemu.recipes",
    "rtemu.training_data_sha256",
    "rtemu.weights_sha256",
    "rtemu.content_sha256",
    "rtemu.metadata_sha256",
)
#: Metadata key of the optional keyed signature (HMAC-SHA256, hex; see :func:`sign_bundle`).
SIGNATURE_KEY = "rtemu.signature_hmac_sha256"
#: Largest bundle file read [bytes]: protobuf's own limit for one message (2 GiB).
MAX_FILE_BYTES = 2**31 - 1
#: Largest total size of the ``rtemu.*`` metadata strings parsed [bytes]; the metadata of
#: the full recipe on 16 channels take well under 1 MB.
MAX_METADATA_BYTES = 16 * 2**20
#: Shortest accepted signing key [bytes] (RFC 2104: keys shorter than the hash output, 32
#: bytes for SHA-256, are discouraged).
MIN_KEY_BYTES = 32
_JSON_KEYS = ("rtemu.channels", "rtemu.pressure_hpa", "rtemu.inputs", "rtemu.outputs", "rtemu.graph",
              "rtemu.features", "rtemu.envelope", "rtemu.flag_thresholds", "rtemu.flag_meanings",
              "rtemu.channel_stats", "rtemu.recipes")


class BundleError(ValueError):
    """A file is not a usable rtemu bundle (the message says why)."""


@dataclasses.dataclass(frozen=True)
class Bundle:
    """Parsed, checked metadata of an rtemu bundle.

    Attributes
    ----------
    path : str
    format_version : int
    rtemu_version : str
        rtemu version that wrote the file.
    created : str
        Creation time, ISO 8601 UTC.
    instrument : Instrument
        The bundle's channels (in output order).
    channel_ids : tuple of str
    pressure_hpa : numpy.ndarray
        The fixed level grid in the order the inputs use [hPa].
    envelope : dict
        Per-variable training bounds used by the flags: ``{name: {"lower", "upper", "units"}}``.
    flag_thresholds : dict
        Margins and novelty limits.
    flag_meanings : dict
        Bit value (str) -> meaning.
    channel_stats : dict
        Channel id -> validation statistics and training provenance.
    recipe_name, recipe_toml : str
        The recipe that created the bundle (its shared transform).
    recipes : dict
        SHA-256 -> TOML text of every recipe used (also by updates).
    training_data_sha256 : str
        SHA-256 of the training file of the first training.
    weights_sha256 : str
    inputs, outputs : list of dict
        ``{"name", "shape", "units", "dtype"}`` of the ONNX inputs and outputs.
    graph : dict
        Static layout of the graph (levels, channels, components, padded hidden widths).
    features : dict
        The shared input transform's settings.
    metadata : dict
        All ``rtemu.*`` metadata strings, verbatim.
    teacher : (str, str)
        Name and version of the model the emulator learned (property).
    """

    path: str
    format_version: int
    rtemu_version: str
    created: str
    instrument: Instrument
    channel_ids: tuple
    pressure_hpa: np.ndarray
    envelope: dict
    flag_thresholds: dict
    flag_meanings: dict
    channel_stats: dict
    recipe_name: str
    recipe_toml: str
    recipes: dict
    training_data_sha256: str
    weights_sha256: str
    inputs: list
    outputs: list
    graph: dict
    features: dict
    metadata: dict

    @property
    def teacher(self) -> tuple[str, str]:
        """(name, version) of the model the emulator learned (``rtemu.teacher``,
        ``rtemu.teacher_version``; the version of the latest training, each channel's own in
        ``channel_stats``). A bundle without the record learned rtemu's physics."""
        return (self.metadata.get("rtemu.teacher", PHYSICS_TEACHER[0]),
                self.metadata.get("rtemu.teacher_version", "unrecorded"))

    def arrays(self) -> dict:
        """The bundle's initializers as numpy arrays (read again from the file, checked)."""
        model = _load_checked(Path(self.path))[0]
        return {init.name: numpy_helper.to_array(init) for init in model.graph.initializer}


# ---- digests ------------------------------------------------------------------------------
def weights_sha256(model: onnx.ModelProto) -> str:
    """SHA-256 over all initializers in name order: name, dtype, shape, raw little-endian bytes."""
    digest = hashlib.sha256()
    for init in sorted(model.graph.initializer, key=lambda t: t.name):
        array = numpy_helper.to_array(init)
        digest.update(init.name.encode("utf-8") + b"\0")
        digest.update(str(array.dtype.newbyteorder("<")).encode() + b"\0")
        digest.update(json.dumps(list(array.shape)).encode() + b"\0")
        digest.update(np.ascontiguousarray(array, dtype=array.dtype.newbyteorder("<")).tobytes())
    return digest.hexdigest()


def content_sha256(model: onnx.ModelProto) -> str:
    """SHA-256 of the serialised model without its metadata (graph, weights, opsets)."""
    bare = onnx.ModelProto()
    bare.CopyFrom(model)
    del bare.metadata_props[:]
    return hashlib.sha256(bare.SerializeToString(deterministic=True)).hexdigest()


def metadata_sha256(props: dict) -> str:
    """SHA-256 of all ``rtemu.*`` metadata except the digests themselves, in key order."""
    skip = {"rtemu.metadata_sha256", SIGNATURE_KEY}
    text = json.dumps({k: v for k, v in sorted(props.items()) if k.startswith(PREFIX) and k not in skip},
                      sort_keys=True, ensure_ascii=True)
    return hashlib.sha256(text.encode("ascii")).hexdigest()


# ---- keyed signature ----------------------------------------------------------------------
def _read_key(key) -> bytes:
    """The secret of ``key``: bytes as given, or the bytes of a key file (path)."""
    if isinstance(key, (bytes, bytearray)):
        secret = bytes(key)
        where = "the key"
    else:
        where = f"key file {key}"
        try:
            secret = Path(key).read_bytes()
        except OSError as exc:
            raise BundleError(f"{where}: cannot be read ({exc.strerror or exc})") from None
    if len(secret) < MIN_KEY_BYTES:
        raise BundleError(f"{where}: {len(secret)} bytes, a signing key needs at least {MIN_KEY_BYTES} "
                          "(e.g. 'head -c 32 /dev/urandom > KEYFILE')")
    return secret


def _signature(model: onnx.ModelProto, props: dict, secret: bytes) -> str:
    """HMAC-SHA256 over the graph and weights (content digest) and all other rtemu metadata."""
    message = b"rtemu bundle signature v1\0" + content_sha256(model).encode() + b"\0" + \
        metadata_sha256(props).encode()
    return hmac.new(secret, message, hashlib.sha256).hexdigest()


def sign_bundle(path, *, key) -> str:
    """Add (or replace) the keyed signature of the bundle at ``path``; returns it (hex).

    The bundle is checked first (:func:`read_bundle`) and rewritten atomically. The
    signature (HMAC-SHA256 under the secret in ``key``) covers the graph, the weights and
    every other ``rtemu.*`` metadata string; only a holder of the key can make one that
    verifies.

    Parameters
    ----------
    path : str or os.PathLike
    key : str, os.PathLike or bytes
        Key file (its raw bytes are the secret, at least 32) or the secret itself.
    """
    from rtemu._io import write_bytes_atomic

    secret = _read_key(key)
    read_bundle(path)
    model, props = _load_checked(Path(path))
    signature = _signature(model, props, secret)
    kept = [p for p in model.metadata_props if p.key != SIGNATURE_KEY]
    del model.metadata_props[:]
    model.metadata_props.extend(kept)
    model.metadata_props.add(key=SIGNATURE_KEY, value=signature)
    write_bytes_atomic(path, model.SerializeToString())
    return signature


def _verify_signature(path: Path, model, props: dict, key) -> None:
    if SIGNATURE_KEY not in props:
        raise BundleError(f"{path}: not signed (no {SIGNATURE_KEY}); a key was given, so an unsigned "
                          "bundle is refused (sign it with 'rtemu sign')")
    expected = _signature(model, props, _read_key(key))
    if not hmac.compare_digest(expected, props[SIGNATURE_KEY]):
        raise BundleError(f"{path}: the HMAC-SHA256 signature does not verify with this key: the bundle "
                          "was changed after signing, or signed with another key")


# ---- reading ------------------------------------------------------------------------------
def _load_checked(path: Path):
    if not path.is_file():
        raise BundleError(f"{path}: no such file")
    size = path.stat().st_size
    if size > MAX_FILE_BYTES:
        raise BundleError(f"{path}: {size} bytes, larger than any ONNX file can be ({MAX_FILE_BYTES})")
    data = path.read_bytes()
    if not data:
        raise BundleError(f"{path}: empty file, not an ONNX model")
    model = onnx.ModelProto()
    try:
        model.ParseFromString(data)
    except Exception as exc:  # protobuf DecodeError and friends
        raise BundleError(f"{path}: not a readable ONNX file (truncated or corrupted): {exc}") from None
    if not model.HasField("graph") or not model.graph.node:
        raise BundleError(f"{path}: not a readable ONNX model (no graph; truncated, corrupted or not ONNX)")
    external = [t.name for t in model.graph.initializer if t.data_location == onnx.TensorProto.EXTERNAL]
    if external:
        raise BundleError(f"{path}: weights {external[:3]} are stored in external data files; an rtemu "
                          "bundle is one self-contained file (refused: the digests and onnxruntime would "
                          "read them from different places)")
    metadata_bytes = sum(len(p.key) + len(p.value) for p in model.metadata_props)
    if metadata_bytes > MAX_METADATA_BYTES:
        raise BundleError(f"{path}: {metadata_bytes} bytes of metadata, more than the {MAX_METADATA_BYTES} "
                          "an rtemu bundle has (refused before parsing)")
    props = {p.key: p.value for p in model.metadata_props}
    if "rtemu.format_version" not in props:
        raise BundleError(
            f"{path}: a valid ONNX file but not an rtemu bundle (foreign model: no "
            f"'rtemu.format_version' metadata; producer {model.producer_name!r})"
        )
    try:
        onnx.checker.check_model(model)
    except Exception as exc:
        raise BundleError(f"{path}: fails the ONNX checker (corrupted?): {exc}") from None
    return model, props


def read_bundle(path, *, key=None) -> Bundle:
    """Open, check and parse an rtemu bundle.

    Checks, in order: file size; readable ONNX; no external data; metadata size; rtemu
    metadata present (else "foreign"); the ONNX checker; format version (newer than
    :data:`FORMAT_VERSION` is refused); all required keys, valid JSON/TOML; consistency
    (channel count of instrument, metadata, graph; level count of the grid and the input
    shapes; input and output names); the SHA-256 of the metadata, of the graph and of the
    weights (corruption, not authorship); with ``key`` the HMAC-SHA256 signature.

    Parameters
    ----------
    key : str, os.PathLike or bytes, optional
        Key file or secret: the bundle must carry a signature that verifies with it.

    Raises
    ------
    BundleError
        With a message naming the file and the failed check.
    """
    path = Path(path)
    model, props = _load_checked(path)
    version_text = props["rtemu.format_version"]
    try:
        version = int(version_text)
    except ValueError:
        raise BundleError(f"{path}: rtemu.format_version {version_text!r} is not an integer (corrupted?)") from None
    if version > FORMAT_VERSION:
        raise BundleError(
            f"{path}: written in rtemu bundle format {version}, newer than this rtemu reads "
            f"(format {FORMAT_VERSION}); upgrade rtemu to use it"
        )
    if version < 1:
        raise BundleError(f"{path}: rtemu.format_version {version} is not a valid format (corrupted?)")
    if version < FORMAT_VERSION:
        raise BundleError(
            f"{path}: written in rtemu bundle format {version}, which this rtemu no longer reads (it reads "
            f"format {FORMAT_VERSION}); retrain with rtemu >= {FORMAT_SINCE}"
        )
    missing = [k for k in REQUIRED_KEYS if k not in props]
    if missing:
        raise BundleError(f"{path}: incomplete rtemu metadata, missing {missing}")
    if metadata_sha256(props) != props["rtemu.metadata_sha256"]:
        raise BundleError(f"{path}: metadata do not match their SHA-256 (rtemu.metadata_sha256): "
                          "the file was corrupted or edited")
    parsed = {}
    for name in _JSON_KEYS:
        try:
            parsed[name] = json.loads(props[name])
        except (json.JSONDecodeError, RecursionError) as exc:
            raise BundleError(f"{path}: metadata {name} is not valid JSON: {exc}") from None
    try:
        instrument = Instrument.from_toml(props["rtemu.instrument_toml"], source=f"{path}:rtemu.instrument_toml")
    except ValueError as exc:
        raise BundleError(f"{path}: metadata rtemu.instrument_toml is not a valid instrument: {exc}") from None

    channels = tuple(parsed["rtemu.channels"])
    graph = parsed["rtemu.graph"]
    grid = np.asarray(parsed["rtemu.pressure_hpa"], dtype=float)
    inputs = {i.name: i for i in model.graph.input}
    outputs = [o.name for o in model.graph.output]

    def dims(name):
        return [d.dim_value if d.HasField("dim_value") else d.dim_param
                for d in inputs[name].type.tensor_type.shape.dim]

    problems = []
    if channels != tuple(instrument.channel_ids):
        problems.append(f"rtemu.channels {list(channels)} differ from the instrument's {list(instrument.channel_ids)}")
    if graph.get("n_channels") != len(channels):
        problems.append(f"rtemu.graph has {graph.get('n_channels')} channels, rtemu.channels {len(channels)}")
    if set(parsed["rtemu.channel_stats"]) != set(channels):
        problems.append("rtemu.channel_stats does not cover exactly the bundle's channels")
    if tuple(inputs) != _graph.INPUT_NAMES:
        problems.append(f"graph inputs {list(inputs)} are not {list(_graph.INPUT_NAMES)}")
    elif (dims("air_temperature")[1:] != [grid.size] or dims("specific_humidity")[1:] != [grid.size]
          or dims("surface_emissivity")[1:] != [len(channels)]):
        problems.append(f"input shapes {dims('air_temperature')}, {dims('surface_emissivity')} do not match "
                        f"{grid.size} levels and {len(channels)} channels")
    if tuple(outputs) != _graph.OUTPUT_NAMES:
        problems.append(f"graph outputs {outputs} are not {list(_graph.OUTPUT_NAMES)}")
    if [o["name"] for o in parsed["rtemu.outputs"]] != outputs or [i["name"] for i in parsed["rtemu.inputs"]] != list(inputs):
        problems.append("rtemu.inputs / rtemu.outputs do not name the graph's inputs and outputs")
    if grid.ndim != 1 or grid.size != graph.get("n_levels") or not (np.all(np.diff(grid) < 0) or np.all(np.diff(grid) > 0)):
        problems.append(f"rtemu.pressure_hpa ({grid.size} values) is not a monotonic grid of "
                        f"{graph.get('n_levels')} levels")
    if problems:
        raise BundleError(f"{path}: inconsistent rtemu bundle: " + "; ".join(problems))
    if weights_sha256(model) != props["rtemu.weights_sha256"]:
        raise BundleError(f"{path}: weights do not match their SHA-256 (rtemu.weights_sha256): the file was "
                          "corrupted or edited")
    if content_sha256(model) != props["rtemu.content_sha256"]:
        raise BundleError(f"{path}: graph does not match its SHA-256 (rtemu.content_sha256): the file was "
                          "corrupted or edited")
    if key is not None:
        _verify_signature(path, model, props, key)
    grid.setflags(write=False)
    return Bundle(
        path=str(path), format_version=version, rtemu_version=props["rtemu.version"],
        created=props["rtemu.created"], instrument=instrument, channel_ids=channels, pressure_hpa=grid,
        envelope=parsed["rtemu.envelope"], flag_thresholds=parsed["rtemu.flag_thresholds"],
        flag_meanings=parsed["rtemu.flag_meanings"], channel_stats=parsed["rtemu.channel_stats"],
        recipe_name=props["rtemu.recipe_name"], recipe_toml=props["rtemu.recipe_toml"],
        recipes=parsed["rtemu.recipes"], training_data_sha256=props["rtemu.training_data_sha256"],
        weights_sha256=props["rtemu.weights_sha256"], inputs=parsed["rtemu.inputs"],
        outputs=parsed["rtemu.outputs"], graph=graph, features=parsed["rtemu.features"],
        metadata={k: v for k, v in props.items() if k.startswith(PREFIX)},
    )


# ---- sessions -----------------------------------------------------------------------------
def pruned_model(model: onnx.ModelProto, outputs) -> onnx.ModelProto:
    """The same model computing only ``outputs`` (nodes and weights the others need are dropped).

    onnxruntime evaluates every node of a graph whatever outputs a run asks for (measured
    with onnxruntime 1.32), so a brightness-temperature-only session runs about half the
    work when it is built from this pruned copy. All inputs stay declared.
    """
    wanted = list(outputs)
    known = [o.name for o in model.graph.output]
    unknown = [o for o in wanted if o not in known]
    if unknown:
        raise ValueError(f"outputs {unknown} are not outputs of the bundle ({', '.join(known)})")
    needed = set(wanted)
    keep = []
    for node in reversed(model.graph.node):
        if any(o in needed for o in node.output):
            keep.append(node)
            needed.update(i for i in node.input if i)
    keep.reverse()
    pruned = onnx.ModelProto()
    pruned.CopyFrom(model)
    graph = pruned.graph
    del graph.node[:]
    graph.node.extend(keep)
    inits = [t for t in model.graph.initializer if t.name in needed]
    del graph.initializer[:]
    graph.initializer.extend(inits)
    outs = [o for o in model.graph.output if o.name in set(wanted)]
    del graph.output[:]
    graph.output.extend(sorted(outs, key=lambda o: wanted.index(o.name)))
    return pruned


def make_session(path, *, outputs=None, threads: int | None = None, check: bool = True):
    """An onnxruntime CPU session on a bundle, optionally computing only ``outputs``.

    Parameters
    ----------
    path : str or os.PathLike
        The bundle.
    outputs : sequence of str, optional
        Output names the session computes (default: all). Asking for fewer makes the
        session skip the nodes only the others need (e.g. the Jacobians).
    threads : int, optional
        ``intra_op_num_threads`` [1]; 1 is fastest for single profiles.
    check : bool
        Run :func:`read_bundle`'s checks first.
    """
    import onnxruntime as ort

    path = Path(path)
    if check:
        read_bundle(path)
    options = ort.SessionOptions()
    if threads:
        options.intra_op_num_threads = int(threads)
    options.inter_op_num_threads = 1
    options.graph_optimization_level = ort.GraphOptimizationLevel.ORT_ENABLE_ALL
    if outputs is None:
        source = str(path)
    else:
        source = pruned_model(onnx.load(str(path)), outputs).SerializeToString()
    return ort.InferenceSession(source, sess_options=options, providers=["CPUExecutionProvider"])


# ---- description --------------------------------------------------------------------------
def _grid_lines(grid, per_line: int = 10) -> list[str]:
    """The grid's pressures [hPa], ``per_line`` to a line, in the bundle's order."""
    values = [f"{x:.7g}" for x in np.asarray(grid, dtype=float)]
    return ["    " + " ".join(f"{v:>10s}" for v in values[i : i + per_line]) for i in range(0, len(values), per_line)]


def describe(path, key=None) -> str:
    """Human-readable summary of a bundle's metadata (for ``rtemu info``); with ``key`` the
    signature is verified first."""
    b = read_bundle(path, key=key)
    signed = SIGNATURE_KEY in b.metadata
    grid = b.pressure_hpa
    lines = [
        f"rtemu bundle {b.path}",
        f"  format version     {b.format_version} (rtemu {b.rtemu_version})",
        f"  created            {b.created}",
        f"  instrument         {b.instrument.name}: {b.instrument.description}",
        f"  channels           {len(b.channel_ids)}: {', '.join(b.channel_ids)}",
        f"  pressure grid      {grid.size} levels, {grid[0]:g} .. {grid[-1]:g} hPa "
        f"({'surface' if grid[0] > grid[-1] else 'top'} first; inputs on other levels: regrid, see "
        "'rtemu simulate --help')",
        *_grid_lines(grid),
        f"  recipe             {b.recipe_name} (sha256 {hashlib.sha256(b.recipe_toml.encode()).hexdigest()[:16]}...)",
        f"  training data      sha256 {b.training_data_sha256}",
        f"  teacher            {b.teacher[0]} {b.teacher[1]}",
        f"  weights            sha256 {b.weights_sha256}",
        "  integrity          SHA-256 digests of graph, weights and metadata match (no corruption detected); "
        "they are unkeyed, anyone editing the file can recompute them, so they do not show who made the file",
        "  signature          " + ("HMAC-SHA256, verified with the given key: made by a holder of the key"
                                   if key is not None else
                                   "HMAC-SHA256 present, not checked (give --key KEYFILE)" if signed else
                                   "none (sign with 'rtemu sign --key KEYFILE')"),
        f"  compression        {b.graph['n_components']} components of T and ln q",
        f"  gray absorbers     up to {b.graph['n_absorbers']} per channel (learned from the training data)",
        f"  hidden layers      {b.graph['hidden']} (padded)",
        "  inputs:",
    ]
    for item in b.inputs:
        lines.append(f"    {item['name']:30s} {str(item['shape']):16s} [{item['units']}] {item['dtype']}")
    lines.append("  outputs:")
    for item in b.outputs:
        lines.append(f"    {item['name']:30s} {str(item['shape']):16s} [{item['units']}] {item['dtype']}")
    lines.append("  quality flag bits: " + ", ".join(f"{k} {v}" for k, v in b.flag_meanings.items()))
    th = b.flag_thresholds
    lines.append(f"  envelope: bounds margin {th['bounds_margin']:g} of the training range, novelty limits "
                 + ", ".join(f"{k} {v:.4g}" for k, v in th["novelty_limits"].items()))
    env = b.envelope
    for name, item in env.items():
        lo, hi = np.asarray(item["lower"], float), np.asarray(item["upper"], float)
        lines.append(f"    {name:28s} {lo.min():.4g} .. {hi.max():.4g} [{item['units']}]"
                     + (f" (per {item['per']})" if item.get("per") else ""))
    trop = th.get("tropopause")
    if trop:
        lo, hi = np.asarray(trop["lower_k"][:-1]), np.asarray(trop["upper_k"][:-1])
        reached = lo <= hi
        lines.append(f"  tropopause check: first level between {trop['base_pressure_hpa'][0]:.4g} and "
                     f"{trop['base_pressure_hpa'][-1]:.4g} hPa with lapse rate <= {trop['lapse_rate_k_per_km']:g} K/km; "
                     f"training reached {int(reached.sum())} of {lo.size} levels, temperature there "
                     + (f"{lo[reached].min():.4g} .. {hi[reached].max():.4g} K" if reached.any() else "-"))
    lines.append("  validation (K):   channel        rmse     bias    p99.9      max  absorbers  gray rmse  hidden"
                 "      iterations  within 2 sigma")
    for cid in b.channel_ids:
        s = b.channel_stats[cid]
        lines.append(
            f"    {cid:>20s} {s['validation_rmse_k']:8.4f} {s['validation_bias_k']:8.4f} "
            f"{s['validation_p999_abs_k']:8.4f} {s['validation_max_abs_k']:8.4f}  {s['n_absorbers']:<10d} "
            f"{s['gray_only_validation_rmse_k']:8.4f}  {str(s['hidden_layers']):12s} {s['iterations']:<11d} "
            f"{s['uncertainty_validation_within_2_sigma']:.3f}"
        )
    return "\n".join(lines)
