"""nipype Interfaces: thin wrappers over the library functions of nl_unwarp."""
