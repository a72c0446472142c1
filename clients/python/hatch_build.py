"""Build hook: generates the gRPC stubs of pollard's contract at build time.

The .proto files are read from the repository (`../../proto` from this folder) when building
from a checkout, or from `proto/` inside an sdist (the sdist build copies them there), so
there is one copy of the contract and no sync step. The wheel gets, under `pollard/v1/`,
the modules grpcio-tools writes (`*_pb2.py`, `*_pb2.pyi`, `*_pb2_grpc.py`), and
`pollard/_contract.py`, the SHA-256 of every .proto file the stubs came from (the tests
compare it with the repository's files, so a stale install is noticed).
"""

import hashlib
import shutil
import tempfile
from pathlib import Path

from hatchling.builders.hooks.plugin.interface import BuildHookInterface


def proto_root(root: Path) -> Path:
    """The folder that holds `pollard/v1/*.proto`: an sdist's copy, else the repository's."""
    for candidate in (root / "proto", root.parent.parent / "proto"):
        if (candidate / "pollard" / "v1" / "pollard.proto").is_file():
            return candidate
    raise RuntimeError(f"no pollard/v1/pollard.proto under {root / 'proto'} or {root.parent.parent / 'proto'}: build from the repository checkout or from an sdist")


class StubsHook(BuildHookInterface):
    PLUGIN_NAME = "custom"

    def initialize(self, version, build_data):
        protos = proto_root(Path(self.root))
        if self.target_name == "sdist":
            build_data["force_include"][str(protos / "pollard")] = "proto/pollard"
            return
        import grpc_tools
        from grpc_tools import protoc

        self._out = Path(tempfile.mkdtemp(prefix="pollard-stubs-"))
        files = sorted((protos / "pollard" / "v1").glob("*.proto"))
        well_known = Path(grpc_tools.__file__).parent / "_proto"
        args = ["grpc_tools.protoc", f"-I{protos}", f"-I{well_known}", f"--python_out={self._out}", f"--pyi_out={self._out}", f"--grpc_python_out={self._out}"]
        args += [str(f) for f in files]
        if protoc.main(args) != 0:
            raise RuntimeError(f"grpc_tools.protoc failed on {', '.join(f.name for f in files)}")
        generated = self._out / "pollard" / "v1"
        for f in sorted(generated.iterdir()):
            if f.suffix in (".py", ".pyi") and f.name != "__init__.py":
                build_data["force_include"][str(f)] = f"pollard/v1/{f.name}"
        digests = {f"pollard/v1/{f.name}": hashlib.sha256(f.read_bytes()).hexdigest() for f in files}
        contract = self._out / "_contract.py"
        lines = ['"""Written by the build (hatch_build.py): the .proto files the stubs were generated from."""', "", "PROTO_SHA256 = {"]
        lines += [f"    {name!r}: {digest!r}," for name, digest in sorted(digests.items())]
        lines += ["}", ""]
        contract.write_text("\n".join(lines))
        build_data["force_include"][str(contract)] = "pollard/_contract.py"

    def finalize(self, version, build_data, artifact_path):
        out = getattr(self, "_out", None)
        if out is not None:
            shutil.rmtree(out, ignore_errors=True)
