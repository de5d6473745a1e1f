"""Warning category of rtemu's own (turned into errors in the test suite)."""


class RtemuWarning(UserWarning):
    """A warning issued by rtemu itself."""
