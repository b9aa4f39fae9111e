"""Regenerate the committed gRPC/protobuf modules from proto/ (see DEVELOPERS.md)."""

from __future__ import annotations

import sys
from pathlib import Path

PROTO_FILES = ("filter", "sync", "storage", "routing", "admin")


def generate(repo_root: Path, out_dir: Path) -> None:
    """Run grpcio-tools' protoc over proto/shardsieve/v1 into out_dir (mirrors the package tree)."""
    from grpc_tools import protoc  # test/dev dependency only

    import grpc_tools

    include = Path(grpc_tools.__file__).parent / "_proto"
    proto_root = repo_root / "proto"
    files = [str(proto_root / "shardsieve" / "v1" / f"{name}.proto") for name in PROTO_FILES]
    args = [
        "protoc",
        f"-I{proto_root}",
        f"-I{include}",
        f"--python_out={out_dir}",
        f"--pyi_out={out_dir}",
        f"--grpc_python_out={out_dir}",
        *files,
    ]
    code = protoc.main(args)
    if code != 0:
        raise SystemExit(f"protoc failed with exit code {code}")


def main() -> None:
    repo_root = Path(__file__).resolve().parent.parent
    generate(repo_root, repo_root)
    print(f"regenerated stubs under {repo_root / 'shardsieve' / 'v1'}", file=sys.stderr)


if __name__ == "__main__":
    main()
