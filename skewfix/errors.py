"""Errors that reach the user as one clear line.

`InputError` and `RuntimeProblem` exit with status 1; `UsageProblem` with 2.
Everything the CLI catches is printed as ``skewfix: <message>`` with no
traceback (unless ``--debug``).
"""


class SkewfixError(Exception):
    """Base of every error meant for the user. ``exit_code`` is the status."""

    exit_code = 1


class InputError(SkewfixError):
    """The input cannot be read or does not hold what the command needs."""


class RuntimeProblem(SkewfixError):
    """The job started but could not be finished (nothing was written)."""


class UsageProblem(SkewfixError):
    """The command line is wrong (bad value, conflicting options)."""

    exit_code = 2


class MeasurementRefused(SkewfixError):
    """A readout measurement that the clip cannot support; says why."""


# What FFmpeg's error codes mean for someone holding the file, by the PyAV exception's
# class name (FFmpeg's AVERROR codes, libavutil/error.h; POSIX errno names for the rest).
_MEDIA_ERROR_WORDS = {
    "InvalidDataError": "the file is damaged, or is not a video",
    "EOFError": "the file ends sooner than its contents say (cut short?)",
    "DemuxerNotFoundError": "the file type is not one this installation can read",
    "DecoderNotFoundError": "this installation has no decoder for the file's video format",
    "EncoderNotFoundError": "this installation has no encoder for that format",
    "MuxerNotFoundError": "this installation cannot write that kind of file (check the extension)",
    "PatchWelcomeError": "the file uses a feature of its format that FFmpeg does not support",
    "PermissionError": "permission denied",
    "FileNotFoundError": "no such file",
    "IsADirectoryError": "is a folder, not a file",
    "NotADirectoryError": "a part of the path is a file, not a folder",
    "FileExistsError": "already exists",
    "TimeoutError": "the file could not be read in time (a network share that stopped answering?)",
    "MemoryError": "out of memory",
}


def plain_media_error(exc: BaseException) -> str:
    """An FFmpeg/PyAV error (or an OS error) in plain words, without ``[Errno N]`` codes or the
    path (the caller's message names the file). Other errors: their first line."""
    for cls in type(exc).__mro__:
        if cls.__module__.startswith("av") and cls.__name__ in _MEDIA_ERROR_WORDS:
            return _MEDIA_ERROR_WORDS[cls.__name__]
        if cls.__name__ in ("FFmpegError", "Exception"):
            break
    if isinstance(exc, OSError) and type(exc).__name__ in _MEDIA_ERROR_WORDS:
        return _MEDIA_ERROR_WORDS[type(exc).__name__]
    words = getattr(exc, "strerror", None) or str(exc).strip()
    words = words.splitlines()[0] if words else type(exc).__name__
    if words.startswith("[Errno"):  # "[Errno 5] Input/output error: 'x'" -> "input/output error"
        words = words.split("]", 1)[-1].strip()
        words = words.split(": '", 1)[0]
    return (words[:1].lower() + words[1:])[:160]
