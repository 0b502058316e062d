"""Inputs: readers of input formats. images.py finds where a PGM/PPM, NPY, TIFF or DICOM
file keeps its samples and turns PNG into pixel records and back; layout.py describes a
found image (the plain descriptor every image frame opens with). A new input format is a
reader here that returns an `ImageInfo` (or, for a new kind of content, a new frame kind
in frames/)."""
