"""The PEP 517 (and PEP 660) build backend of plumb-wire, standard library only.

The package is a few pure-Python modules; a wheel is a zip of them with three metadata files
(PEP 427, PEP 566), so building one needs no setuptools and no download.
"""
import base64
import hashlib
import io
import os
import re
import tarfile
import zipfile

HERE = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
PACKAGE = "plumb_wire"


def _project():
    """name, version, description, requires-python and dependencies from pyproject.toml."""
    with open(os.path.join(HERE, "pyproject.toml"), encoding="utf-8") as f:
        text = f.read()
    try:
        import tomllib
        return tomllib.loads(text)["project"]
    except ImportError:  # Python < 3.11: the [project] table's plain string keys and one list
        section = text.split("[project]", 1)[1]
        found = dict(re.findall(r'^([\w-]+) = "([^"]*)"', section, re.M))
        deps = re.search(r"^dependencies = \[(.*)\]", section, re.M)
        found["dependencies"] = re.findall(r'"([^"]+)"', deps.group(1)) if deps else []
        return found


def _dist(project):
    return project["name"].replace("-", "_") + "-" + project["version"]


def _metadata(project):
    lines = ["Metadata-Version: 2.1", f"Name: {project['name']}", f"Version: {project['version']}",
             f"Summary: {project['description']}",
             f"Requires-Python: {project['requires-python']}"]
    lines += [f"Requires-Dist: {d}" for d in project["dependencies"]]
    lines.append("Description-Content-Type: text/markdown")
    with open(os.path.join(HERE, "README.md"), encoding="utf-8") as f:
        return "\n".join(lines) + "\n\n" + f.read()


def _wheel(directory, files):
    """Writes a py3-none-any wheel of `files` ({archive name: bytes}); returns its file name."""
    project = _project()
    dist = _dist(project)
    info = dist + ".dist-info"
    files = dict(files)
    files[f"{info}/METADATA"] = _metadata(project).encode()
    files[f"{info}/WHEEL"] = (b"Wheel-Version: 1.0\nGenerator: plumb_wire_build\n"
                              b"Root-Is-Purelib: true\nTag: py3-none-any\n")
    record = []
    for name, data in files.items():
        digest = base64.urlsafe_b64encode(hashlib.sha256(data).digest()).rstrip(b"=").decode()
        record.append(f"{name},sha256={digest},{len(data)}")
    record.append(f"{info}/RECORD,,")
    files[f"{info}/RECORD"] = ("\n".join(record) + "\n").encode()
    name = dist + "-py3-none-any.whl"
    with zipfile.ZipFile(os.path.join(directory, name), "w", zipfile.ZIP_DEFLATED) as z:
        for arc, data in files.items():
            z.writestr(zipfile.ZipInfo(arc, (1980, 1, 1, 0, 0, 0)), data)
    return name


def _modules():
    root = os.path.join(HERE, PACKAGE)
    out = {}
    for name in sorted(os.listdir(root)):
        if name.endswith(".py"):
            with open(os.path.join(root, name), "rb") as f:
                out[f"{PACKAGE}/{name}"] = f.read()
    return out


def get_requires_for_build_wheel(config_settings=None):
    return []


def get_requires_for_build_sdist(config_settings=None):
    return []


def get_requires_for_build_editable(config_settings=None):
    return []


def build_wheel(wheel_directory, config_settings=None, metadata_directory=None):
    return _wheel(wheel_directory, _modules())


def build_editable(wheel_directory, config_settings=None, metadata_directory=None):
    """A wheel holding one .pth file that puts this directory on sys.path."""
    return _wheel(wheel_directory, {f"{PACKAGE}.pth": (HERE + "\n").encode()})


def build_sdist(sdist_directory, config_settings=None):
    dist = _dist(_project())
    name = dist + ".tar.gz"
    with tarfile.open(os.path.join(sdist_directory, name), "w:gz") as tar:
        for rel in ["pyproject.toml", "README.md", "_build/plumb_wire_build.py",
                    *_modules().keys()]:
            tar.add(os.path.join(HERE, rel), arcname=f"{dist}/{rel}")
        meta = _metadata(_project()).encode()
        ti = tarfile.TarInfo(f"{dist}/PKG-INFO")
        ti.size = len(meta)
        tar.addfile(ti, io.BytesIO(meta))
    return name
