"""Generate the Python wire code from ``protos/`` with grpcio-tools, or check it is current.

Usage::

    python scripts/gen_protos.py           # (re)write protos/midstream/wire/*_pb2*.py{,i}
    python scripts/gen_protos.py --check   # exit 1 if the files on disk are stale

The proto lives at ``protos/midstream/wire/midstream.proto`` so that the import paths protoc
writes (``from midstream.wire import midstream_pb2``) are the installed import names: no
post-processing of generated code is needed.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
from pathlib import Path

from grpc_tools import protoc

REPO = Path(__file__).resolve().parent.parent
PROTO_ROOT = REPO / "protos"
WIRE = PROTO_ROOT / "midstream" / "wire"
OUTPUTS = ("midstream_pb2.py", "midstream_pb2.pyi", "midstream_pb2_grpc.py")


def generate(out_root: Path) -> None:
    include = str(Path(protoc.__file__).parent / "_proto")
    args = [
        "grpc_tools.protoc",
        f"-I{PROTO_ROOT}",
        f"-I{include}",
        f"--python_out={out_root}",
        f"--pyi_out={out_root}",
        f"--grpc_python_out={out_root}",
        str(WIRE / "midstream.proto"),
    ]
    if protoc.main(args) != 0:
        raise SystemExit("protoc failed")


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--check", action="store_true", help="only check the files are current")
    check = parser.parse_args().check
    with tempfile.TemporaryDirectory() as tmp:
        generate(Path(tmp))
        fresh = Path(tmp) / "midstream" / "wire"
        stale = [name for name in OUTPUTS
                 if not (WIRE / name).exists()
                 or (WIRE / name).read_bytes() != (fresh / name).read_bytes()]
        if check:
            if stale:
                print(f"generated wire code is stale: {', '.join(stale)}; "
                      "run python scripts/gen_protos.py", file=sys.stderr)
                return 1
            return 0
        for name in OUTPUTS:
            (WIRE / name).write_bytes((fresh / name).read_bytes())
    return 0


if __name__ == "__main__":
    sys.exit(main())
