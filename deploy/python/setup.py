"""Generates the gRPC stubs from the repository's protos as the package is
built: nothing generated is committed, and the stubs always match the
protos they were built from."""

import pathlib

from setuptools import setup
from setuptools.command.build_py import build_py

HERE = pathlib.Path(__file__).resolve().parent
PROTO_ROOT = HERE.parent.parent / "proto"
PROTOS = sorted((PROTO_ROOT / "gibbsline" / "v1").glob("*.proto"))


def generate(out_dir: pathlib.Path) -> None:
    from grpc_tools import protoc
    import grpc_tools

    package = out_dir / "gibbsline_rig" / "v1"
    package.mkdir(parents=True, exist_ok=True)
    include = pathlib.Path(grpc_tools.__file__).parent / "_proto"
    args = [
        "protoc",
        f"-I{PROTO_ROOT}",
        f"-I{include}",
        f"--python_out={out_dir}",
        f"--grpc_python_out={out_dir}",
        *map(str, PROTOS),
    ]
    if protoc.main(args) != 0:
        raise RuntimeError("protoc failed on " + ", ".join(map(str, PROTOS)))
    # protoc writes gibbsline/v1/*_pb2.py; the package imports them as
    # gibbsline_rig.v1.*: move them under it and fix their imports.
    generated = out_dir / "gibbsline" / "v1"
    for path in generated.glob("*.py"):
        text = path.read_text().replace("from gibbsline.v1 import", "from gibbsline_rig.v1 import")
        (package / path.name).write_text(text)
        path.unlink()
    (package / "__init__.py").write_text('"""Generated from proto/gibbsline/v1 at build time."""\n')


class BuildWithStubs(build_py):
    def run(self):
        super().run()
        generate(pathlib.Path(self.build_lib))


setup(cmdclass={"build_py": BuildWithStubs})
