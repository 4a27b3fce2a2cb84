# Embedded init code of the crowdcore C library (runs once, inside the host process).
# build_cabi.py prepends `_CC_BAKED = {...}`: paths of the environment the library was built in.
# It must never raise: a failure is handed to the C side as text, so every later call returns
# CC_ERR_INIT with that text instead of cffi's silent 0.


def _cc_start():
    import os
    import sys
    from _crowdcore_cabi import ffi, lib
    try:
        import site
        # When the host had started Python itself, make the project's packages visible too.
        for p in reversed(_CC_BAKED["front_paths"]):
            if p not in sys.path:
                sys.path.insert(0, p)
        for d in _CC_BAKED["site_dirs"]:
            site.addsitedir(d)          # process .pth files like a normal start of the venv
        # Before numba is imported: a passive OpenMP wait (an actively spinning thread stalls when
        # the other core is busy) and a writable kernel cache.
        os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")
        cache = _cc_cache_dir(os)
        if cache:
            os.environ["NUMBA_CACHE_DIR"] = cache
        import crowdcore.cabi as cabi
        where = os.path.dirname(os.path.abspath(cabi.__file__))
        if os.path.realpath(where) != os.path.realpath(_CC_BAKED["package_dir"]):
            raise ImportError(f"imported crowdcore from {where}, but the library was built for "
                              f"{_CC_BAKED['package_dir']}; rebuild with `crowdcore cabi --build`")
        cabi._bind(ffi, lib)
        lib.cc__init_report(0, b"")
    except BaseException as e:  # noqa: BLE001 - report everything, including SystemExit
        import traceback
        tail = "".join(traceback.format_exception(type(e), e, e.__traceback__, limit=-4))
        text = (f"crowdcore: start-up of the embedded runtime failed: {type(e).__name__}: {e}\n"
                f"python {sys.version.split()[0]} at {sys.executable}; sys.path={sys.path}\n{tail}")
        lib.cc__init_report(1, text.encode("utf-8", "replace")[:4000])


def _cc_cache_dir(os):
    """Keep NUMBA_CACHE_DIR when it is writable; else a per-user folder, else a temp folder.

    Unset is left unset: numba then caches beside the sources (or in its user-wide folder when those
    are read-only), the same place Python users of this install fill, so warm starts are shared.
    """
    import tempfile
    want = os.environ.get("NUMBA_CACHE_DIR")
    if not want:
        return None
    candidates = [want, os.path.join(os.path.expanduser("~"), ".cache", "crowdcore", "numba"),
                  os.path.join(tempfile.gettempdir(), f"crowdcore-numba-{os.getuid() if hasattr(os, 'getuid') else 0}")]
    for d in candidates:
        try:
            os.makedirs(d, exist_ok=True)
            if os.access(d, os.W_OK | os.X_OK):
                return d
        except OSError:
            pass
    raise OSError(f"no writable folder for the numba cache among {candidates}")


_cc_start()
