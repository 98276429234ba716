"""Which cycle-accurate engine runs a simulation, and why.

Two engines return the same :class:`~dvgate.sim.trace.RunResult`: ``python`` (Amaranth's
simulator, :func:`dvgate.sim.testbench.run_amaranth`) and ``compiled`` (the gateware as
C++, :func:`dvgate.sim.compiled.run_compiled`). The compiled one is the default wherever
a C++ compiler is found; otherwise the default falls back to python and says so.
"""

from __future__ import annotations

from collections.abc import Callable

from dvgate.errors import UserError
from dvgate.sim.trace import RunResult

__all__ = ["ENGINES", "choose", "fastest", "get_engine"]

#: Engine names, as ``dvgate sim --engine`` takes them.
ENGINES = ("python", "compiled")

RunFunction = Callable[..., RunResult]


def _python() -> RunFunction:
    from dvgate.sim.testbench import run_amaranth

    return run_amaranth


def _compiled() -> RunFunction:
    from dvgate.sim.compiled import run_compiled

    return run_compiled


def choose() -> tuple[str, str]:
    """The default engine's name and the reason it was chosen.

    Returns
    -------
    (str, str)
        ``("compiled", "C++ compiler: ...")`` when a compiler is found, else
        ``("python", "no C++ compiler found ...")``.
    """
    from dvgate.sim.compiled import compiler_description

    found = compiler_description()
    if found is not None:
        return "compiled", f"C++ compiler found: {found}"
    return "python", ("no C++ compiler found (looked for $CXX, g++, clang++ and c++), so the compiled "
                      "engine is not available; falling back to the python engine")


def fastest() -> RunFunction:
    """The run function of the fastest engine available here."""
    return _compiled() if choose()[0] == "compiled" else _python()


def get_engine(name: str | None, datapath: str = "per_channel") -> tuple[RunFunction, str]:
    """The run function for ``name`` and a one-line description for reports.

    Parameters
    ----------
    name : str or None
        ``"python"``, ``"compiled"``, or None for the default (:func:`choose`).
    datapath : str
        The config's ``rate.datapath``: the compiled engine models the per-channel
        datapath only, so the shared one runs in the python engine.

    Returns
    -------
    (callable, str)
        ``run(params, stim, *, vcd_path=None) -> RunResult`` and, for example,
        ``"compiled (CXXRTL; C++ compiler found: g++ 12.2.0)"``.

    Raises
    ------
    UserError
        An unknown name, ``"compiled"`` where no C++ compiler is found, or ``"compiled"``
        for the shared datapath.
    """
    if datapath == "shared":
        if name == "compiled":
            raise UserError("--engine compiled: the compiled engine models the per-channel datapath; this config "
                            "has rate.datapath = 'shared': use --engine python")
        return _python(), "python (Amaranth simulator; the shared datapath runs only here)"
    if name is None:
        chosen, why = choose()
        if chosen == "compiled":
            return _compiled(), f"compiled (CXXRTL; {why})"
        return _python(), f"python (Amaranth simulator; {why})"
    if name == "python":
        return _python(), "python (Amaranth simulator)"
    if name == "compiled":
        from dvgate.sim.compiled import compiler_description

        found = compiler_description()
        if found is None:
            raise UserError("--engine compiled: no C++ compiler found (looked for $CXX, g++, clang++ and c++); "
                            "install one (for example `apt install g++`) or use --engine python")
        return _compiled(), f"compiled (CXXRTL; C++ compiler: {found})"
    raise UserError(f"engine = {name!r}: allowed: {', '.join(ENGINES)}")
