"""The committed generated modules must be exactly what grpcio-tools makes from proto/.

Generated code is never edited by hand; this test fails when someone changes a .proto
without regenerating (run `python -m shardsieve.protogen`) or edits a *_pb2*.py file.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from shardsieve import protogen

REPO = Path(__file__).resolve().parents[2]
GENERATED = REPO / "shardsieve" / "v1"


def test_regenerated_stubs_match_committed(tmp_path: Path) -> None:
    pytest.importorskip("grpc_tools", reason="grpcio-tools is a test dependency (pip install -e '.[test]')")
    protogen.generate(REPO, tmp_path)
    fresh_dir = tmp_path / "shardsieve" / "v1"
    fresh = sorted(p.name for p in fresh_dir.iterdir() if p.is_file())
    committed = sorted(p.name for p in GENERATED.iterdir() if p.name != "__init__.py" and p.is_file())
    assert fresh == committed, "generated file set differs: regenerate with `python -m shardsieve.protogen`"
    stale = [name for name in fresh if (fresh_dir / name).read_bytes() != (GENERATED / name).read_bytes()]
    assert not stale, f"stubs drifted from proto/: {stale}; regenerate with `python -m shardsieve.protogen`"


def test_every_proto_file_is_generated() -> None:
    protos = sorted(p.stem for p in (REPO / "proto" / "shardsieve" / "v1").glob("*.proto"))
    assert protos == sorted(protogen.PROTO_FILES)
