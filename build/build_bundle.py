"""Build ``build/liftmag.lv2`` from this checkout (``make plugin`` runs this).

A thin wrapper: the builder is part of the package (``liftmag_lv2.bundle``), so that
``liftmag plugin install`` works from an installed wheel too. Run it with the interpreter
whose environment the plugin should use; its path is baked into the shared object.
"""

from __future__ import annotations

from liftmag_lv2.bundle import main

if __name__ == "__main__":
    raise SystemExit(main())
