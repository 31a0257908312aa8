"""Keras models: ``archive`` (``.keras`` zip archives) and ``h5_layout`` (legacy HDF5 and
``.weights.h5``: where Keras puts each variable) read through ``hdf5_access`` (checked HDF5
access, every h5py call in a sandboxed child process); ``model_config`` (config parsing,
variable roles, canonical orientation), ``layers`` (layers and links) and ``optimizer``
(optimizer slots mapped onto model variables)."""
