from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("tempofield")
except PackageNotFoundError:  # running from a source tree without installing
    __version__ = "0.1.0"
