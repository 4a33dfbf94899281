"""C code generation: jinja2 templates fed by plain data built from the planned IR."""
