"""The batch job: where imaging and the network meet. Rules, decoding, the ledger, outputs."""
