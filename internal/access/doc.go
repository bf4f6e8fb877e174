// Package access is who may use the API: tokens and their scopes, secrets
// and their keyed hashing, the keyring each process verifies requests
// against, page sessions for signed-in browsers, and the audit log of admin
// actions.
package access
