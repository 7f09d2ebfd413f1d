"""A module whose import fails with an error of its own (not a missing module)."""

raise RuntimeError("this module refuses to be imported")
