"""BokehJS in the page: loaded inline from the installed bokeh package, once per kernel.

jupyter_bokeh's widget view expects ``window.Bokeh`` to be in the page already.
Plants and test machines are often offline, so the JavaScript comes from the
bokeh package itself (``bokeh.resources.INLINE``), never from a CDN.
"""

from __future__ import annotations

_loaded = False


def in_kernel() -> bool:
    """True when running inside a Jupyter kernel (where displayed output reaches a page).

    Examples
    --------
    >>> in_kernel()
    False
    """
    try:
        from IPython import get_ipython
    except ImportError:
        return False
    shell = get_ipython()
    return shell is not None and getattr(shell, "kernel", None) is not None


def load_bokehjs(*, force: bool = False) -> bool:
    """Put BokehJS into the page (inline, no CDN) unless this kernel already did.

    Call before displaying the first bokeh figure; the explorer calls it when it is
    first displayed. ``force=True`` loads it again (after the page was reloaded
    while the kernel kept running). Outside a kernel nothing is sent.

    Returns
    -------
    bool
        True when BokehJS was sent to the page by this call.

    Examples
    --------
    >>> load_bokehjs()  # outside a kernel: nothing to load into
    False
    """
    global _loaded
    if (_loaded and not force) or not in_kernel():
        return False
    from bokeh.io import output_notebook
    from bokeh.resources import INLINE

    output_notebook(resources=INLINE, hide_banner=True)
    _loaded = True
    return True
