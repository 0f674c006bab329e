"""One router per resource: auth, registry, datasets, uploads, reviews, api, admin."""
