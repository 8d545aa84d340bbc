from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("rhythmap")
except PackageNotFoundError:  # running from a source tree without installing
    __version__ = "0.1.0"
