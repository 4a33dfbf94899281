"""Build and run emitted C: on the host through cffi, on Cortex-M under QEMU."""
