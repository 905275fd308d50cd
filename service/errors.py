"""Domain errors of Ramiform.

The numeric core raises these; the web layer maps them to HTTP status codes in one
place (``service.web.errors``) and the CLI prints them as error objects.
"""


class RamiformError(Exception):
    """Base class for every error Ramiform raises on purpose."""

    #: HTTP status the web layer answers with.
    status_code = 400


class SpecimenError(RamiformError):
    """The image decodes but holds nothing that can be measured (empty mask, 1 x 1, ...)."""

    status_code = 422


class UnsupportedFormatError(RamiformError):
    """The bytes are not an image format Ramiform reads (SVG, HTML, PDF, archives, ...)."""

    status_code = 415


class ImageTooLargeError(RamiformError):
    """The image decodes to more pixels than the configured limit (decompression bombs)."""

    status_code = 413


class LibraryError(RamiformError):
    """A reference set is missing, damaged, or of a schema this version does not read."""

    status_code = 500


class ConflictError(RamiformError):
    """The request raced another one that changed the same specimen first; nothing was changed."""

    status_code = 409
