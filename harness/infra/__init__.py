"""Infrastructure shared by every layer: nothing here imports another ``harness`` package.

The child-process guard (``child_process``), the exit-code table and the option
specifications live here, below the model, the solvers, the references and the audit.
"""
