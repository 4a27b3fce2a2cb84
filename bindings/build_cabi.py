"""Build the crowdcore C library (cffi embedding mode): libcrowdcore.so + crowdcore.h.

    python bindings/build_cabi.py [OUT_DIR]        # or: crowdcore cabi --build [--out DIR]

The library embeds the Python interpreter running this script: its home, executable, standard
library and site-packages, and the location of the crowdcore package are baked in, so a host needs
no Python paths. Rebuild after moving the environment or the project.
"""
import os
import shutil
import sys
import sysconfig
import tempfile

HERE = os.path.dirname(os.path.abspath(__file__))
MODULE = "_crowdcore_cabi"
LIBNAME = "crowdcore"          # -> libcrowdcore.so


def _read(name):
    with open(os.path.join(HERE, name), encoding="utf-8") as f:
        return f.read()


def header_cdef(header_text):
    """The cffi-parsable block of the public header (constants, typedefs, structs)."""
    start = header_text.index("@cdef-begin")
    start = header_text.index("\n", start) + 1
    end = header_text.index("/* @cdef-end */")
    return header_text[start:end]


def _c_string(s):
    """A C string literal holding the UTF-8 bytes of s."""
    out = []
    for b in s.encode("utf-8"):
        ch = chr(b)
        if ch in '"\\?':
            out.append("\\" + ch)
        elif 32 <= b < 127:
            out.append(ch)
        else:
            out.append("\\%03o" % b)
    return '"' + "".join(out) + '"'


def baked_config(package_dir):
    """Where the interpreter, its libraries and crowdcore live (taken from the running interpreter)."""
    import site
    package_dir = os.path.abspath(package_dir)
    package_parent = os.path.dirname(package_dir)
    # the standard library entries of this interpreter's own path (zip, stdlib, lib-dynload)
    bases = tuple(os.path.join(b, "") for b in {sys.base_prefix, sys.base_exec_prefix})
    stdlib = [p for p in sys.path if p and p.startswith(bases) and "-packages" not in p]
    if not stdlib:
        stdlib = [sysconfig.get_path("stdlib"), os.path.join(sysconfig.get_path("stdlib"), "lib-dynload")]
    site_dirs = [d for d in site.getsitepackages() if os.path.isdir(d)]
    paths = []
    for p in [package_parent] + stdlib + site_dirs:
        if p not in paths:
            paths.append(p)
    return {
        "executable": sys.executable,
        "base_executable": getattr(sys, "_base_executable", sys.executable),
        "home": sys.base_prefix,
        "prefix": sys.prefix,
        "exec_prefix": sys.exec_prefix,
        "base_exec_prefix": sys.base_exec_prefix,
        "paths": paths,                      # the whole module path of the embedded interpreter
        "front_paths": [package_parent],     # put first when the host had already started Python
        "site_dirs": site_dirs,
        "package_dir": package_dir,
        "libdir": sysconfig.get_config_var("LIBDIR") or "",
    }


def make_ffi(package_dir):
    import cffi
    baked = baked_config(package_dir)
    header = _read("crowdcore.h")
    bridge = _read("cabi_cdef.h")
    ffi = cffi.FFI()
    ffi.cdef(header_cdef(header))
    ffi.cdef(bridge)
    ffi.embedding_api("")            # embedding mode; the exported functions are the C wrappers
    # static prototypes of the extern "Python" bridge, so the wrappers can call them
    protos = []
    inside = False
    for line in bridge.splitlines():
        s = line.strip()
        if s.startswith('extern "Python"'):
            inside = True
        elif inside and s == "}":
            inside = False
        elif inside and s.startswith("int32_t cc__py_"):
            protos.append("static " + s)
    defines = [
        f"#define CC__BAKED_EXECUTABLE {_c_string(baked['executable'])}",
        f"#define CC__BAKED_BASE_EXECUTABLE {_c_string(baked['base_executable'])}",
        f"#define CC__BAKED_HOME {_c_string(baked['home'])}",
        f"#define CC__BAKED_PREFIX {_c_string(baked['prefix'])}",
        f"#define CC__BAKED_EXEC_PREFIX {_c_string(baked['exec_prefix'])}",
        f"#define CC__BAKED_BASE_EXEC_PREFIX {_c_string(baked['base_exec_prefix'])}",
        "#define CC__BAKED_PATHS { " + ", ".join(_c_string(p) for p in baked["paths"]) + " }",
    ]
    source = "\n".join(defines + ['#include "crowdcore.h"'] + protos) + "\n" + _read("cabi_source.c")
    link = []
    if baked["libdir"] and sys.platform != "win32":
        link.append(f"-Wl,-rpath,{baked['libdir']}")    # find libpython without LD_LIBRARY_PATH
    ffi.set_source(MODULE, source, include_dirs=[HERE], extra_link_args=link,
                   extra_compile_args=["-O2", "-std=gnu99"])
    init = f"_CC_BAKED = {baked!r}\n" + _read("cabi_init.py")
    ffi.embedding_init_code(init)
    return ffi


def build(out_dir, package_dir=None, verbose=False):
    """Compile into out_dir; returns the library path. Writes libcrowdcore.so and crowdcore.h."""
    if package_dir is None:
        package_dir = os.path.join(os.path.dirname(HERE), "crowdcore")
    if not sysconfig.get_config_var("Py_ENABLE_SHARED") and sys.platform != "win32":
        raise RuntimeError(f"{sys.executable} was built without a shared libpython; the C library "
                           "needs one to embed Python (rebuild Python with --enable-shared)")
    out_dir = os.path.abspath(out_dir)
    os.makedirs(out_dir, exist_ok=True)
    ffi = make_ffi(package_dir)
    with tempfile.TemporaryDirectory(prefix="crowdcore-cabi-") as tmp:
        built = ffi.compile(tmpdir=tmp, target=f"lib{LIBNAME}.*", verbose=verbose)
        ext = os.path.splitext(built)[1]
        final = os.path.join(out_dir, f"lib{LIBNAME}{ext}")
        part = final + ".part"
        shutil.copyfile(built, part)
        os.chmod(part, 0o755)
        os.replace(part, final)      # atomic: a running host keeps the old inode
    hdr_part = os.path.join(out_dir, "crowdcore.h.part")
    shutil.copyfile(os.path.join(HERE, "crowdcore.h"), hdr_part)
    os.replace(hdr_part, os.path.join(out_dir, "crowdcore.h"))
    return final


if __name__ == "__main__":
    print(build(sys.argv[1] if len(sys.argv) > 1 else os.path.join(os.path.dirname(HERE), "crowdcore", "_native"),
                verbose="-v" in sys.argv))
