// Package deploy holds the deployment artefacts and the tests that check them.
package deploy
