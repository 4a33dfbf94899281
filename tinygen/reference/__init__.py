"""numpy int8 reference kernels: the same contract as runtime_c, op for op.

Each module here pairs with runtime_c/src/tg_<module>.c and takes the same parameters.
Inputs and outputs are numpy arrays in storage order (channels-last for spatial tensors).
"""
