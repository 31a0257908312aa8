"""Keras models: ``archive`` (``.keras`` zip archives) and ``h5_loader`` (HDF5 files), which read
``weights_h5`` (Keras 3 ``.weights.h5``: where Keras puts each variable) and ``legacy_h5``
(legacy whole models and weights-only ``.h5``) through ``h5_file`` (where the bytes are, links
walked one at a time) and ``hdf5_access`` (checked attributes and datasets, every h5py call in
a sandboxed child process); ``model_config`` (the config flattened into atoms, with
``inbound``, ``config_values``, ``layer_classes``, ``variables`` and ``layer_settings``),
``layers`` (layers and links: ``layer_factory``, ``orientation``, ``attention``, ``linking``) and
``optimizer`` (optimizer slots mapped onto model variables)."""
