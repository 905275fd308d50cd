"""Growth films: read a film of a growing deposit, follow it frame by frame, measure its growth.

No web imports here; ``ramiform film`` and ``POST /api/films`` call :func:`analyze_film`.
"""

from service.film.analysis import SHORT_CIRCUIT_CAUTION, FilmAnalysis, FilmOptions, analyze_film
from service.film.read import FilmLimits, FilmSource, film_from_frames, open_film

__all__ = ["SHORT_CIRCUIT_CAUTION", "FilmAnalysis", "FilmLimits", "FilmOptions", "FilmSource", "analyze_film",
           "film_from_frames", "open_film"]
