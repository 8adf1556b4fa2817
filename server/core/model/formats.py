"""What a model file is, told from its bytes, so a wrong ``kind`` gets a message that names the right one.

Nothing here unpickles or runs the file. The layouts read are:

* safetensors: an 8-byte little-endian header length, then a JSON header starting with ``{``
  (safetensors format documentation);
* zip archives (``PK\\x03\\x04``) written by torch: ``*/constants.pkl`` and ``*/code/`` mark a
  TorchScript archive (``torch.jit.save``); ``*/archive_format`` or ``*/models/*.json`` a
  ``torch.export`` archive (``torch.export.save``, .pt2); ``*/data.pkl`` alone a ``torch.save`` file,
  whose pickle is then read opcode by opcode (``pickletools.genops``, nothing executed): a
  state_dict starts with a dict or ``collections.OrderedDict``, a whole pickled model with the
  model's class;
* the legacy (non-zip) ``torch.save`` format: a pickle protocol opcode ``\\x80\\x02`` followed by
  torch's magic number;
* ONNX: a protobuf ``ModelProto`` whose first field is ``ir_version`` (field 1, varint: byte 0x08)
  followed by another ``ModelProto`` field tag (onnx.proto).
"""

from __future__ import annotations

import io
import json
import pickletools
import struct
import zipfile
from pathlib import Path

from pellucid.core.errors import ModelLoadError

__all__ = ["FORMAT_WORDS", "check_kind", "sniff"]

SAFETENSORS, STATE_DICT, PICKLED_MODULE = "safetensors", "state_dict", "pickled_module"
TORCHSCRIPT, EXPORT, ONNX, TORCH_LEGACY = "torchscript", "export", "onnx", "torch_legacy"
OTHER_ZIP, UNKNOWN = "zip", "unknown"

FORMAT_WORDS = {
    SAFETENSORS: "a safetensors weights file (a state_dict)",
    STATE_DICT: "a state_dict saved with torch.save",
    PICKLED_MODULE: "a whole pickled model (torch.save(model))",
    TORCHSCRIPT: "a TorchScript archive (torch.jit.save)",
    EXPORT: "a torch.export archive (torch.export.save, .pt2)",
    ONNX: "an ONNX file",
    TORCH_LEGACY: "a torch.save file in the old non-zip format",
    OTHER_ZIP: "a zip archive that none of torch's savers wrote",
    UNKNOWN: "a file of unknown format",
}

_STATE_KINDS = ("torchvision", "timm", "factory")
# What each spec kind reads from its weights file.
_ACCEPTS = {
    "torchvision": {SAFETENSORS, STATE_DICT, TORCH_LEGACY},
    "timm": {SAFETENSORS, STATE_DICT, TORCH_LEGACY},
    "factory": {SAFETENSORS, STATE_DICT, TORCH_LEGACY},
    "export": {EXPORT},
    "torchscript": {TORCHSCRIPT},
    "pickled": {PICKLED_MODULE, TORCH_LEGACY},
    "onnx": {ONNX},
}
_KIND_WORDS = {
    "torchvision": "a state_dict", "timm": "a state_dict", "factory": "a state_dict",
    "export": "a torch.export archive", "torchscript": "a TorchScript archive",
    "pickled": "a whole pickled model", "onnx": "an ONNX file",
}


def sniff(path: Path) -> str:
    """The format of the file at ``path`` (one of the keys of :data:`FORMAT_WORDS`)."""
    try:
        with open(path, "rb") as fh:
            head = fh.read(64)
    except OSError:
        return UNKNOWN
    if head.startswith(b"PK\x03\x04"):
        return _sniff_zip(path)
    if len(head) >= 10:
        (n,) = struct.unpack("<Q", head[:8])
        if 2 <= n <= 100_000_000 and head[8:9] == b"{" and _safetensors_header(path, n):
            return SAFETENSORS
    if head.startswith(b"\x80\x02\x8a\x0al\xfc\x9cF\xf9 j\xa8P\x19"):
        return TORCH_LEGACY
    if len(head) >= 3 and head[0] == 0x08 and head[1] < 0x80 and head[2] in (0x12, 0x1A, 0x22, 0x28, 0x32, 0x3A, 0x42):
        return ONNX
    return UNKNOWN


def _safetensors_header(path: Path, n: int) -> bool:
    try:
        with open(path, "rb") as fh:
            fh.seek(8)
            return isinstance(json.loads(fh.read(n)), dict)
    except (OSError, ValueError):
        return False


def _sniff_zip(path: Path) -> str:
    try:
        with zipfile.ZipFile(path) as zf:
            names = zf.namelist()
            if any(n.endswith("/constants.pkl") for n in names) and any("/code/" in n for n in names):
                return TORCHSCRIPT
            if any(n.endswith("/archive_format") for n in names) or any("/models/" in n and n.endswith(".json")
                                                                        for n in names):
                return EXPORT
            pkl = [n for n in names if n.endswith("/data.pkl") and n.count("/") == 1]
            if pkl:
                return _pickle_kind(zf.read(pkl[0]))
    except (OSError, zipfile.BadZipFile, KeyError):
        pass
    return OTHER_ZIP


def _pickle_kind(data: bytes) -> str:
    """state_dict or whole model, from the first object the pickle builds (opcodes only)."""
    try:
        for op, arg, _pos in pickletools.genops(io.BytesIO(data)):
            if op.name in ("PROTO", "FRAME", "MARK"):
                continue
            if op.name in ("EMPTY_DICT", "DICT"):
                return STATE_DICT
            if op.name == "GLOBAL":
                return STATE_DICT if arg in ("collections OrderedDict", "builtins dict", "__builtin__ dict") \
                    else PICKLED_MODULE
            return STATE_DICT if op.name.startswith("EMPTY_") else PICKLED_MODULE
    except (ValueError, EOFError):
        pass
    return STATE_DICT


def _advice(fmt: str, file: str) -> str:
    if fmt in (SAFETENSORS, STATE_DICT):
        return (f"use kind = \"factory\" (your model's code), or \"torchvision\" / \"timm\" for their "
                f"architectures, with weights = \"{file}\"")
    if fmt == TORCHSCRIPT:
        return f"use kind = \"torchscript\" with weights = \"{file}\""
    if fmt == EXPORT:
        return f"use kind = \"export\" with weights = \"{file}\""
    if fmt == ONNX:
        return f"use kind = \"onnx\" with weights = \"{file}\" (needs pip install 'pellucid[onnx]')"
    if fmt == PICKLED_MODULE:
        return (f"use kind = \"pickled\" with weights = \"{file}\" and --trust-pickled (only for files you made "
                "yourself), or save model.state_dict() and use kind = \"factory\"")
    return "check that the file was saved the way this kind expects"


def check_kind(path: Path, kind: str) -> str:
    """Raise ModelLoadError when ``path`` is plainly another format than spec kind ``kind`` reads.

    Returns the sniffed format. Unknown formats pass through: the reader's own error names them.
    """
    fmt = sniff(path)
    if fmt in (UNKNOWN, OTHER_ZIP) or fmt in _ACCEPTS.get(kind, set()):
        return fmt
    raise ModelLoadError(
        f"{path.name!r} is {FORMAT_WORDS[fmt]}, but kind = \"{kind}\" reads {_KIND_WORDS[kind]}: "
        f"{_advice(fmt, path.name)}"
    )
