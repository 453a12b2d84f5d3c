"""The add-on's own error: a problem the artist can fix, reported in Blender's status bar."""


class AddonError(Exception):
    """A setting or object prevents the operation; the message names it and the fix."""
