"""The one amount and date grammar of ledgers (decimal and pounds/shillings/pence), page balance, misread estimate."""
