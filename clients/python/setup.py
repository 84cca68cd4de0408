"""Build hook: generate the gRPC stubs from the repository's proto/ directory.

The stubs are written into ``holdout_ledger/_proto/`` of the build (or of the source tree for an
editable install) by ``grpc_tools.protoc``, a build requirement, so nothing but PyPI is needed.
Absolute imports between generated modules (``from holdout.v1 import types_pb2``) are rewritten
to package-relative ones so the stubs never collide with another package named ``holdout``.

Where the protos are: $HOLDOUT_PROTO_DIR if set, else ``../../proto`` next to this file (a clone
of the repository), else ``proto/`` inside this directory (an sdist).
"""

import os
import re
import shutil
import sys
from pathlib import Path

from setuptools import setup
from setuptools.command.build_py import build_py
from setuptools.command.sdist import sdist

HERE = Path(__file__).resolve().parent
PACKAGE = "holdout_ledger"


def proto_root() -> Path:
    candidates = []
    if os.environ.get("HOLDOUT_PROTO_DIR"):
        candidates.append(Path(os.environ["HOLDOUT_PROTO_DIR"]))
    candidates += [HERE.parent.parent / "proto", HERE / "proto"]
    for c in candidates:
        if (c / "holdout" / "v1").is_dir():
            return c.resolve()
    raise SystemExit(
        "holdout-ledger-client: cannot find proto/holdout/v1/*.proto (looked in "
        + ", ".join(str(c) for c in candidates)
        + "); install from a clone of the repository or set HOLDOUT_PROTO_DIR"
    )


IMPORT_RE = re.compile(r"^from holdout\.v1 import ", re.MULTILINE)


def generate(out_pkg_dir: Path) -> None:
    """Runs protoc over every proto of holdout/v1 into OUT_PKG_DIR/_proto."""
    from grpc_tools import protoc  # build requirement
    import grpc_tools

    root = proto_root()
    protos = sorted(str(p.relative_to(root)) for p in (root / "holdout" / "v1").glob("*.proto"))
    if not protos:
        raise SystemExit(f"holdout-ledger-client: no .proto files under {root}/holdout/v1")
    out = out_pkg_dir / "_proto"
    if out.exists():
        shutil.rmtree(out)
    out.mkdir(parents=True)
    well_known = Path(grpc_tools.__file__).resolve().parent / "_proto"
    args = [
        "grpc_tools.protoc",
        f"-I{root}",
        f"-I{well_known}",
        f"--python_out={out}",
        f"--pyi_out={out}",
        f"--grpc_python_out={out}",
        *protos,
    ]
    if protoc.main(args) != 0:
        raise SystemExit(f"holdout-ledger-client: protoc failed on {root}: {' '.join(args)}")
    for d in (out, out / "holdout", out / "holdout" / "v1"):
        (d / "__init__.py").touch()
    prefix = f"from {PACKAGE}._proto.holdout.v1 import "
    for f in (out / "holdout" / "v1").iterdir():
        if f.suffix in (".py", ".pyi"):
            text = f.read_text(encoding="utf-8")
            f.write_text(IMPORT_RE.sub(prefix, text), encoding="utf-8")
    print(f"holdout-ledger-client: generated stubs for {len(protos)} protos from {root}", file=sys.stderr)


class BuildPyWithStubs(build_py):
    """build_py that first generates the stubs into the build (or source, when editable)."""

    def run(self):
        super().run()
        if getattr(self, "editable_mode", False):
            generate(HERE / "src" / PACKAGE)
        else:
            generate(Path(self.build_lib) / PACKAGE)

    def get_outputs(self, include_bytecode=True):
        outs = list(super().get_outputs(include_bytecode))
        gen = Path(self.build_lib) / PACKAGE / "_proto"
        if gen.exists():
            outs += [str(p) for p in gen.rglob("*") if p.is_file()]
        return outs


class SdistWithProtos(sdist):
    """sdist that carries a copy of the protos, so the sdist builds without the repository."""

    def make_release_tree(self, base_dir, files):
        super().make_release_tree(base_dir, files)
        root = proto_root()
        dest = Path(base_dir) / "proto" / "holdout" / "v1"
        dest.mkdir(parents=True, exist_ok=True)
        for p in (root / "holdout" / "v1").glob("*.proto"):
            shutil.copy2(p, dest / p.name)


setup(cmdclass={"build_py": BuildPyWithStubs, "sdist": SdistWithProtos})
