#!/usr/bin/env python3
"""Makes, offline, the two base images that tests/deploy.rs builds the container image on.

Usage: container_bases.py        (prints BUILD_IMAGE=... and RUNTIME_IMAGE=... on stdout)

No container registry is reachable where the suite runs, so the bases named in
deploy/container/Containerfile cannot be pulled. Instead:

- BUILD_IMAGE: Debian 12 (bookworm) from `debootstrap --variant=minbase` (Debian's own package
  and mirror), imported with `podman import`. It stands in for the Rust build image in the
  build stage; the test feeds that stage a binary compiled on the host (see the Containerfile).
- RUNTIME_IMAGE: a stand-in for gcr.io/distroless/cc-debian12 cut from the same debootstrap
  tree: only the files of the Debian packages that image is made of (package lists taken
  from the distroless repository's base/config.bzl and cc/config.bzl for debian12, plus the
  base-files, netbase, tzdata and CA certificates every distroless image has), its three
  users (root, nobody, nonroot = 65532) and nothing else: no shell, no package manager, no
  zlib. A binary that needs more than the real image has fails here too.

Both are cached: the two root-filesystem tarballs under
${POSTERIORD_CONTAINER_CACHE:-${XDG_CACHE_HOME:-~/.cache}/posteriord/container-bases}, the
images in podman's own store. A cold run (debootstrap) takes about a minute and a half, a
warm one a second. Delete the cache directory (and `podman rmi` the two images) to refresh
them from the mirror, e.g. for Debian point releases; BASES_VERSION below names the recipe.
"""

import io
import os
import shutil
import subprocess
import sys
import tarfile
import tempfile

BASES_VERSION = "1"
SUITE = "bookworm"
BUILD_IMAGE = f"localhost/posteriord-test/bookworm-build:v{BASES_VERSION}"
RUNTIME_IMAGE = f"localhost/posteriord-test/cc-debian12:v{BASES_VERSION}"

# What the runtime stand-in is made of. distroless debian12: "static" (base-files, netbase,
# tzdata, CA certificates, passwd/group), "base" adds libc6 and libssl3, "cc" adds libgomp1,
# libstdc++6, libgcc-s1 and gcc-12-base. zlib1g is NOT in cc-debian12 (only in debian13).
RUNTIME_PACKAGES = [
    "base-files",
    "netbase",
    "tzdata",
    "ca-certificates",
    "libc6",
    "libssl3",
    "libgomp1",
    "libstdc++6",
    "libgcc-s1",
    "gcc-12-base",
]
# debootstrap's minbase lacks some of them.
EXTRA_INCLUDE = ["ca-certificates", "netbase", "libssl3", "libgomp1"]
# Files maintainer scripts create (so not in `dpkg -L`) that the real image also has.
GENERATED = ["etc/ssl/certs/ca-certificates.crt"]
PASSWD = (
    "root:x:0:0:root:/root:/sbin/nologin\n"
    "nobody:x:65534:65534:nobody:/nonexistent:/sbin/nologin\n"
    "nonroot:x:65532:65532:nonroot:/home/nonroot:/sbin/nologin\n"
)
GROUP = "root:x:0:\nnobody:x:65534:\ntty:x:5:\nstaff:x:50:\nnonroot:x:65532:\n"


def log(message):
    print(f"container_bases: {message}", file=sys.stderr, flush=True)


def run(*args, **kw):
    return subprocess.run(args, check=True, **kw)


def have_image(name):
    return (
        subprocess.run(
            ["podman", "image", "exists", name], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL
        ).returncode
        == 0
    )


def canonical(root, rel):
    """`rel` inside `root` with symlinked directories resolved (merged /usr: lib -> usr/lib)."""
    parent, leaf = os.path.split(rel.lstrip("/"))
    real_parent = os.path.realpath(os.path.join(root, parent))
    real_root = os.path.realpath(root)
    if not (real_parent + "/").startswith(real_root + "/") and real_parent != real_root:
        raise SystemExit(f"{rel} resolves outside the tree")
    return os.path.relpath(os.path.join(real_parent, leaf), real_root)


def runtime_tar(root, out):
    """Write the distroless stand-in as a tarball: listed packages' files, users, no shell."""
    listed = subprocess.run(
        ["dpkg-query", f"--admindir={root}/var/lib/dpkg", "-L", *RUNTIME_PACKAGES],
        check=True,
        capture_output=True,
        text=True,
    ).stdout.split("\n")
    paths = set()
    for rel in [p for p in listed if p.startswith("/")] + GENERATED:
        c = canonical(root, rel)
        if c == "." or not os.path.lexists(os.path.join(root, c)):
            continue  # dpkg lists diversions and the tree's root itself
        paths.add(c)
        # Every parent directory, so modes and owners come from the tree.
        while True:
            c = os.path.dirname(c)
            if not c:
                break
            paths.add(c)
    # Leave out what the real image does not carry even though a listed package ships it.
    drop = ("usr/share/doc/", "usr/share/man/", "usr/share/lintian/", "usr/sbin/", "usr/bin/")
    paths = {p for p in paths if not p.startswith(drop)}
    # Written below with the real image's contents instead.
    paths -= {"bin", "sbin", "lib", "lib64", "etc/passwd", "etc/group", "tmp", "home"}
    with tarfile.open(out, "w") as tar:
        for rel in sorted(paths):
            tar.add(os.path.join(root, rel), arcname=rel, recursive=False)
        # merged /usr, as in Debian 12
        for link, target in [("bin", "usr/bin"), ("sbin", "usr/sbin"), ("lib", "usr/lib"), ("lib64", "usr/lib64")]:
            info = tarfile.TarInfo(link)
            info.type, info.linkname, info.mode = tarfile.SYMTYPE, target, 0o777
            tar.addfile(info)
        for name, text in [("etc/passwd", PASSWD), ("etc/group", GROUP)]:
            data = text.encode()
            info = tarfile.TarInfo(name)
            info.size, info.mode = len(data), 0o644
            tar.addfile(info, io.BytesIO(data))
        for name, mode, uid in [("tmp", 0o1777, 0), ("home", 0o755, 0), ("home/nonroot", 0o700, 65532)]:
            info = tarfile.TarInfo(name)
            info.type, info.mode, info.uid, info.gid = tarfile.DIRTYPE, mode, uid, uid
            tar.addfile(info)


def make_tarballs(cache):
    """debootstrap once; write build.tar (the whole tree) and runtime.tar (the cut-down one)."""
    for tool in ["debootstrap", "dpkg-query"]:
        if not shutil.which(tool):
            raise SystemExit(f"{tool} is required (apt-get install debootstrap; tests/run.sh does)")
    os.makedirs(cache, exist_ok=True)
    with tempfile.TemporaryDirectory(prefix="posteriord-debootstrap-") as tmp:
        root = os.path.join(tmp, "root")
        log(f"debootstrap --variant=minbase {SUITE} (about a minute, once)")
        run(
            "debootstrap",
            "--variant=minbase",
            f"--include={','.join(EXTRA_INCLUDE)}",
            SUITE,
            root,
            stdout=subprocess.DEVNULL,
        )
        # Package caches and logs only make the image bigger.
        for junk in ["var/cache/apt/archives", "var/lib/apt/lists", "var/log"]:
            for entry in os.listdir(os.path.join(root, junk)):
                p = os.path.join(root, junk, entry)
                if os.path.isfile(p):
                    os.remove(p)
        runtime_tar(root, os.path.join(cache, "runtime.tar.part"))
        with open(os.path.join(cache, "build.tar.part"), "wb") as out:
            run("tar", "--numeric-owner", "-C", root, "-c", ".", stdout=out)
    # Renamed last, so an interrupted run leaves no half tarball that looks complete.
    for name in ["runtime.tar", "build.tar"]:
        os.replace(os.path.join(cache, name + ".part"), os.path.join(cache, name))


def main():
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    cache = os.environ.get("POSTERIORD_CONTAINER_CACHE") or os.path.join(
        base, "posteriord", "container-bases"
    )
    cache = os.path.join(cache, f"v{BASES_VERSION}")
    wanted = [(BUILD_IMAGE, "build.tar"), (RUNTIME_IMAGE, "runtime.tar")]
    missing = [(image, tar) for image, tar in wanted if not have_image(image)]
    if missing:
        if not all(os.path.exists(os.path.join(cache, tar)) for _, tar in wanted):
            make_tarballs(cache)
        for image, tar in missing:
            log(f"podman import {tar} {image}")
            with open(os.path.join(cache, tar), "rb") as f:
                run("podman", "import", "-", image, stdin=f, stdout=subprocess.DEVNULL)
    print(f"BUILD_IMAGE={BUILD_IMAGE}")
    print(f"RUNTIME_IMAGE={RUNTIME_IMAGE}")


if __name__ == "__main__":
    main()
