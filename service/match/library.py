"""The reference library: one open reference set and its fitted model, made once and passed in.

A process that ranks specimens makes one :class:`ReferenceLibrary` (the CLI per run, the web
app at start-up, each analysis worker in its initializer) and hands it to
:func:`service.match.match` and :func:`service.analysis.analyze`; nothing else keeps a copy.
Opening is lazy: the manifest is read on first use and the model (``persist.load_or_fit``)
when first needed, each once, so a missing set costs nothing until something asks for it,
and then raises ``LibraryError`` at every use (a set put in place later is then found).
"""

from __future__ import annotations

import threading
from pathlib import Path

__all__ = ["ReferenceLibrary", "default_library", "library_of", "process_library", "start_process_library"]


class ReferenceLibrary:
    """The open reference set (``.reference_set``) and its fitted model (``.model``).

    Parameters
    ----------
    source : path, ReferenceSet or None
        A reference set folder, an open ``ReferenceSet``, or None for the bundled set.
    """

    def __init__(self, source=None) -> None:
        self._source = source
        self._lock = threading.RLock()
        self._set = None if source is None or isinstance(source, (str, bytes, Path)) else source
        self._model = None

    @classmethod
    def open(cls, source=None) -> ReferenceLibrary:
        """A library of ``source`` whose manifest is read now (raises ``LibraryError``)."""
        library = cls(source)
        library.reference_set  # noqa: B018 - reading the manifest is the check
        return library

    @property
    def directory(self) -> str | None:
        """The folder asked for (None: the bundled set)."""
        if self._set is not None:
            return str(self._set.path)
        return None if self._source is None else str(self._source)

    @property
    def reference_set(self):
        """The open ``ReferenceSet`` (manifest read on first use)."""
        with self._lock:
            if self._set is None:
                from service.library.load import load_reference_set

                self._set = load_reference_set(self._source)
            return self._set

    @property
    def model(self):
        """The fitted and calibrated ``ReferenceModel``: read from the set's cache when stored for
        this code and these clusters, else fitted (seconds) and stored; once per library."""
        with self._lock:
            if self._model is None:
                from service.match.persist import load_or_fit
                from service.match.ranking import fit_reference_model

                reference_set = self.reference_set
                self._model = load_or_fit(reference_set, lambda: fit_reference_model(reference_set))
            return self._model

    def warm(self) -> str | None:
        """Open the set and its model now; the reason they cannot be opened, or None."""
        from service.errors import LibraryError

        try:
            self.model  # noqa: B018
        except LibraryError as exc:
            return str(exc)
        return None

    def __reduce__(self):
        # Another process opens the same folder itself rather than receiving arrays.
        return (ReferenceLibrary, (self.directory,))

    def __repr__(self) -> str:
        return f"ReferenceLibrary({self.directory or 'bundled'!r})"


_DEFAULT: list[ReferenceLibrary] = []
_DEFAULT_LOCK = threading.Lock()


def default_library() -> ReferenceLibrary:
    """The bundled set's library for callers that pass none (one per process, made on first call)."""
    with _DEFAULT_LOCK:
        if not _DEFAULT:
            _DEFAULT.append(ReferenceLibrary(None))
        return _DEFAULT[0]


def library_of(reference) -> ReferenceLibrary:
    """``reference`` as a library: itself; the default for None; a folder's new library; and for an
    open ``ReferenceSet``, the set's own library, made on its first use and living as long as the
    set (a caller that holds a set and ranks many specimens loads its model once, without any
    table kept beside the objects the caller holds)."""
    if isinstance(reference, ReferenceLibrary):
        return reference
    if reference is None:
        return default_library()
    if isinstance(reference, (str, bytes, Path)):
        return ReferenceLibrary(reference)
    own = getattr(reference, "_reference_library", None)
    if not isinstance(own, ReferenceLibrary):
        own = ReferenceLibrary(reference)
        try:
            reference._reference_library = own
        except AttributeError:  # a set type without room for it: a library per call
            pass
    return own


def _asked(library: ReferenceLibrary) -> str | None:
    source = library._source
    if source is None or isinstance(source, (str, bytes, Path)):
        return None if source is None else str(source)
    return library.directory


#: The library this process opened for its work (an analysis worker's, a batch's).
_PROCESS: list[ReferenceLibrary] = []


def start_process_library(directory: str | None) -> ReferenceLibrary:
    """Open ``directory``'s library for this process and load its model now (a worker pool's
    initializer). A set that cannot be opened does not stop the process: each analysis then
    says in its warnings why it was not ranked."""
    library = ReferenceLibrary(directory)
    library.warm()
    _PROCESS[:] = [library]
    return library


def process_library(directory: str | None) -> ReferenceLibrary:
    """This process's library of ``directory``: the one opened for it, else one opened now and kept.

    Matched on the folder asked for (``directory`` once opened names the folder found, which for
    the bundled set is not the None asked for)."""
    if not (_PROCESS and _asked(_PROCESS[0]) == (None if directory is None else str(directory))):
        _PROCESS[:] = [ReferenceLibrary(directory)]
    return _PROCESS[0]
