"""Provenance: the versions and machine recorded with every result."""

from __future__ import annotations

import platform
import sys

import numpy
import torch
import torchvision

import pellucid
from pellucid.core.provenance import provenance, provenance_line


def test_versions_match_the_running_libraries():
    p = provenance()
    # Reference: each library's own __version__ attribute (independent of the metadata we read).
    assert p["pellucid"] == pellucid.__version__
    assert p["python"] == ".".join(map(str, sys.version_info[:3]))
    assert p["torch"].split("+")[0] == torch.__version__.split("+")[0]
    assert p["torchvision"].split("+")[0] == torchvision.__version__.split("+")[0]
    assert p["numpy"] == numpy.__version__
    assert p["cpu"] and p["cpu_count"] and platform.machine() in p["platform"]
    assert p["torch_threads"] == torch.get_num_threads()


def test_one_line_names_every_version():
    p = provenance()
    line = provenance_line(p)
    for part in (f"Pellucid {p['pellucid']}", f"Python {p['python']}", f"torch {p['torch']}",
                 f"torchvision {p['torchvision']}", f"numpy {p['numpy']}", f"CPU {p['cpu']}"):
        assert part in line
