"""The C runtime (include/ headers, src/ kernels), shipped inside the installed package as
tinygen.runtime_c so tinygen finds it through importlib.resources (setup.py maps it)."""
