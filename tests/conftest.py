"""Suite-wide settings: hypothesis keeps its files out of the working directory."""

import tempfile

from hypothesis import configuration

configuration.set_hypothesis_home_dir(tempfile.mkdtemp(prefix="danpack-hypothesis-"))
