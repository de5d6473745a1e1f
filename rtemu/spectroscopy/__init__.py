"""Line spectroscopy stage: line lists and passbands, a line-by-line teacher, a correlated-k builder.

Modules: :mod:`~rtemu.spectroscopy.lines` (file formats, line shapes, absorption),
:mod:`~rtemu.spectroscopy.linebyline` (:class:`LineByLineOperator`),
:mod:`~rtemu.spectroscopy.ckd` (:func:`build_correlated_k`, :func:`write_instrument`),
:mod:`~rtemu.spectroscopy.invented` (the INVENTED demo line lists) and
:mod:`~rtemu.spectroscopy.build` (command line). See docs/spectroscopy.md.
"""

from rtemu.spectroscopy.ckd import build_correlated_k, write_instrument
from rtemu.spectroscopy.linebyline import LineByLineOperator
from rtemu.spectroscopy.lines import read_line_list, read_passbands

__all__ = ["LineByLineOperator", "build_correlated_k", "write_instrument", "read_line_list", "read_passbands"]
