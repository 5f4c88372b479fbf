package scenario

import (
	"testing"

	"github.com/ventderive/ventderive/consumer"
)

// The expectations are computed with the service's default pairing window.
func TestPairingWindowIsServiceDefault(t *testing.T) {
	w := consumer.DefaultConfig().Window
	if w.Before != PairingBefore || w.After != PairingAfter {
		t.Errorf("consumer default window %v/%v, scenario assumes %v/%v", w.Before, w.After, PairingBefore, PairingAfter)
	}
}
