"""corrtransforms: correlation functions, record-length errors, condition indicators and
error-aware shift detection for vibration-sensor archives, as Apache Beam transforms.

The modules directly under this package are the numerical and archive core (numpy, scipy,
pyarrow only; never apache_beam). The Beam glue lives in :mod:`corrtransforms.beam`.
"""

__version__ = "0.1.0"
