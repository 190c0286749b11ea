"""Pure numerics of cest-node (being written; see DEVELOPERS.md for the contract)."""
