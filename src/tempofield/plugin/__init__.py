"""napari contributions of tempofield: analysis panel, region inspector, samples, reader, writer.

This sub-package is the only place where napari, Qt and magicgui are imported.
The manifest ``napari.yaml`` beside this file is declared through the
``napari.manifest`` entry point; every module here gathers parameters and
calls the engine (:mod:`tempofield.engine.run`, :mod:`tempofield.outputs.result`), with no
numerics of its own. Importing this package itself imports nothing from napari.
"""
