package engine

import (
	"testing"

	"holomix/internal/testenv"
)

// TestMain fails the package's tests when any goroutine outlives them.
func TestMain(m *testing.M) {
	testenv.MainNoLeaks(m)
}
