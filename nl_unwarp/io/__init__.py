"""File input and output: NIfTI images, transform files, coil model files.

Every conversion between our internal conventions (RAS+ mm displacements) and
a file format's conventions lives in this package.
"""
