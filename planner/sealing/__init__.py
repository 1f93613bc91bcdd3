"""Sealing beyond one passphrase: the round's key sealed for trustees and for the host.

``planner.seal`` seals a round's key with the coordinator's passphrase; the modules here
seal it to public keys instead (``trustees``). Nothing is imported here, so that importing
the subpackage stays cheap: import the module you need.
"""
