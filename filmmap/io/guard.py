"""Guards that run before any work: outputs never replace inputs.

Publishing an output folder replaces it whole (`filmmap.io.publish.staged_output`): the
previous folder and everything in it is deleted.  So before anything is staged or fitted,
the output folder is compared with every file the run reads, and refused when

* it *is* an input, *contains* an input, or *lies inside* an input (an input folder);
* an input lies in a staging or old-results folder that a killed earlier run left beside
  it (those are swept before staging);
* it is a symbolic link: replacing it would put a real folder in place of the link and
  leave the link's target stale.  With ``follow_link=True`` (``--follow-output-link``) the
  link's target is replaced instead and the link is kept.

Paths are compared after resolving symbolic links (`pathlib.Path.resolve`), and also with
only their folder resolved, so that an input that is itself a link lying inside the output
folder (the link would be deleted) is caught as well.
"""

from __future__ import annotations

import os
from pathlib import Path

from filmmap.errors import FilmmapInputError


def lot_inputs(config):
    """Every file a reduce of ``config`` reads, with what it is.

    Parameters
    ----------
    config : filmmap.io.lotfile.LotConfig

    Returns
    -------
    list of (str, pathlib.Path)
        (role, path): the lot file, each spectra file, the reference and dark spectra
        (raw-intensity mode) and each layer's n,k table.
    """
    m = config.measurement
    found = [("lot file", Path(config.path))]
    found += [("spectra file", Path(f)) for f in m.files]
    if m.reference_file is not None:
        found.append(("reference file", Path(m.reference_file)))
    if m.dark_file is not None:
        found.append(("dark file", Path(m.dark_file)))
    found += [("n,k table", Path(layer.nk_file)) for layer in config.stack.layers
              if layer.nk_file is not None]
    return found


def history_inputs(db_path):
    """The history database and the files SQLite keeps beside it (WAL, shared memory, journal).

    Parameters
    ----------
    db_path : path-like or None
        Database file; None means the per-user default
        (`filmmap.history.store.default_history_path`).

    Returns
    -------
    list of (str, pathlib.Path)

    References
    ----------
    .. [1] SQLite documentation, "Write-Ahead Logging" (the ``-wal`` and ``-shm`` files)
       and "Temporary Files Used By SQLite" (the rollback ``-journal``).
    """
    from filmmap.history.store import default_history_path

    path = Path(default_history_path() if db_path is None else db_path)
    return [("history database", path)] + [
        ("history database", path.with_name(path.name + suffix))
        for suffix in ("-wal", "-shm", "-journal")]


def _forms(path):
    """The path with every link resolved, and with only its folder resolved (the entry itself)."""
    path = Path(os.path.abspath(path))
    return {path.resolve(), path.parent.resolve() / path.name}


def _within(inner, outer):
    return inner == outer or outer in inner.parents


def output_target(outdir, follow_link=False, option="-o"):
    """The folder that publishing ``outdir`` will replace; refuses a symbolic link.

    Parameters
    ----------
    outdir : path-like
        The output folder as given.
    follow_link : bool
        Accept a symbolic link and replace its target (the link itself is kept).
    option : str
        Command-line option named in the error.

    Returns
    -------
    pathlib.Path
        Absolute path of the folder to replace (the link's target when following).

    Raises
    ------
    FilmmapInputError
        ``outdir`` is a symbolic link and ``follow_link`` is False.
    """
    outdir = Path(outdir)
    if os.path.islink(outdir):
        target = outdir.resolve()
        if not follow_link:
            raise FilmmapInputError(
                f"output folder is a symbolic link to {target}; publishing would replace the "
                "link with a real folder and leave its target stale. Give the target folder "
                f"itself, or --follow-output-link to replace the target", file=outdir,
                field=option)
        return target
    return Path(os.path.abspath(outdir))


def check_outputs_spare_inputs(outdirs, inputs, option="-o"):
    """Refuse output folders that equal, contain or lie inside any input.

    Parameters
    ----------
    outdirs : iterable of path-like
        Folders that will be replaced whole (after `output_target`).
    inputs : iterable of (str, path-like)
        (role, path) of every file or folder the run reads (`lot_inputs`,
        `history_inputs`).  Paths that do not exist are compared too: a history
        database that is about to be created inside an output folder would be lost.
    option : str
        Command-line option named in the error.

    Raises
    ------
    FilmmapInputError
        Naming the output folder and the input (with its role); nothing is touched.
    """
    inputs = [(role, Path(p), _forms(p)) for role, p in inputs]
    for outdir in outdirs:
        outdir = Path(outdir)
        out_forms = _forms(outdir)
        parent = Path(os.path.abspath(outdir)).parent.resolve()
        # leftovers of a killed run (.NAME.filmmap-*) are deleted before staging, too
        doomed = set(out_forms) | {p.resolve() for p in parent.glob(f".{outdir.name}.filmmap-*")}
        for role, given, forms in inputs:
            for out in doomed:
                for inp in forms:
                    if _within(inp, out):
                        how = "is" if inp == out else "contains"
                        shown = outdir if out in out_forms else out
                        raise FilmmapInputError(
                            f"output folder {shown} {how} the {role} {given}; publishing the "
                            "results would delete it. Choose an output folder outside every "
                            "input (nothing was written)", file=outdir, field=option)
                    if _within(out, inp):
                        raise FilmmapInputError(
                            f"output folder {outdir} lies inside the {role} {given}; expected "
                            "an output folder outside every input (nothing was written)",
                            file=outdir, field=option)
