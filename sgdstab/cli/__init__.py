"""The command line (`sgdstab demo | bound | report`) and the demo's invented scenario. May import
any other part of sgdstab; nothing imports it except ``python -m sgdstab``."""
