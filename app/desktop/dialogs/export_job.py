"""The export's background work: write the files of a plan off the GUI thread.

:class:`ExportJob` is a :class:`~modescope.app.desktop.workers.background.Job` that runs
:func:`~modescope.core.output.export.run_export` once in the pool of a
:class:`~modescope.app.desktop.workers.background.BackgroundRunner`; it never touches a widget.
How it ends, by the background pattern's signals:

* ``finished(report)``: every planned file was written;
* ``cancelled(report)``: stopped on request after the current file (the report lists what was
  written and what was skipped); ``cancelled(None)`` when it was stopped before it started;
* ``failed(message)``: writing failed; :func:`export_error_message` words the expected errors.

``progress((done, total))`` counts files, once with 0 before the first file and after each file.
"""

from __future__ import annotations

from typing import Any

from modescope.core.errors import ModescopeError
from modescope.core.output.export import ExportPlan, run_export

from modescope.app.desktop.workers.background import Job, JobContext, Stopped, error_message

__all__ = ["ExportJob", "export_error_message", "EXPORT_TASK"]

#: Subject of the message for an unexpected error while writing.
EXPORT_TASK = "The export"


def export_error_message(exc: BaseException) -> str:
    """Return a message for the user about an export failure, without a traceback.

    Parameters
    ----------
    exc : BaseException
        What planning or writing raised.

    Returns
    -------
    str
        For :class:`MemoryError`, :class:`OSError`, the project's errors and the refusals of
        planning (``TypeError``, ``ValueError``) a plain sentence in the dialog's words; for
        anything else (a bug) the background pattern's unexpected-error sentence.
    """
    if isinstance(exc, MemoryError):
        return "There is not enough memory for this export. Try fewer images or a lower rank."
    if isinstance(exc, (ModescopeError, TypeError, ValueError)):
        text = str(exc) or type(exc).__name__
        # the core speaks in parameter names; the dialog in the words of its controls
        text = text.replace("allow writing there explicitly (allow_source_folder=True)",
                            'tick "Allow writing into a folder that holds source images"')
        text = text.replace("export the model without float16",
                            'untick "Compact model in float16"')
        text = text[:1].upper() + text[1:]
        return text if text.endswith((".", "!", "?", ")")) else text + "."
    if isinstance(exc, OSError):
        where = f" ({exc.filename})" if getattr(exc, "filename", None) else ""
        return f"A file could not be written{where}: {exc.strerror or exc}"
    return error_message(exc, EXPORT_TASK)     # a bug: the program's one wording for those


class ExportJob(Job):
    """Write the files of one :class:`~modescope.core.output.plan.ExportPlan` in a pool thread.

    Create it in the GUI thread and hand it to a ``BackgroundRunner`` (``submit``).

    Parameters
    ----------
    plan : ExportPlan
        From :func:`~modescope.core.output.export.plan_export`.

    Raises
    ------
    TypeError
        If ``plan`` is not an ExportPlan.
    """

    def __init__(self, plan: ExportPlan):
        if not isinstance(plan, ExportPlan):
            raise TypeError(f"plan must be an ExportPlan, got {type(plan).__name__}")
        super().__init__(task=EXPORT_TASK, describe_error=export_error_message)
        self.plan = plan

    def execute(self, context: JobContext) -> Any:
        """Write the files (in the pool thread); a stop on request returns ``Stopped(report)``."""
        def progress(done: int, total: int) -> None:
            context.progress((int(done), int(total)))

        report = run_export(self.plan, progress=progress, cancel=context.cancelled)
        return Stopped(report) if report.cancelled else report
