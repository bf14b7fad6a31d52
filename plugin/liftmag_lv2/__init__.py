"""The LV2 plugin: TTL writer, cffi build script, C shim, bridge and bundle builder.

Everything needed to build the plugin ships inside the package (``shim.c`` and the TTL
templates are package data), so ``liftmag plugin install`` works from a plain
``pip install``; it needs a C compiler, the Python headers and the LV2 headers.

Modules: :mod:`.ttl` (plugin list, control ports, Turtle), :mod:`.build_shim` (the cffi
build and the generated ``liftmag_ports.h``), :mod:`.bundle` (assembles ``liftmag.lv2``),
:mod:`.bridge` (the Python side the shim calls, copied into the bundle). Importing this
package imports none of them.
"""
