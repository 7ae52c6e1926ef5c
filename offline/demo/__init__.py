"""The garden-supply demo shop: its catalogue, its visitors, and the exact next-click oracle."""
