package watch

import (
	"fmt"
	"testing"

	"github.com/stretchr/testify/assert"

	"stillwater/cmd/stillwater/internal/console"
	"stillwater/vision"
)

func TestWhyOf(t *testing.T) {
	assert.Nil(t, WhyOf(vision.Features{Area: 1}, 0, 0), "no candidates judged: nothing to say")
	f := vision.Features{Area: 0.3, Half: 0.21, Length: 0.9, Width: 0.35, Contrast: -0.38, Chroma: 6.5, Tint: 12, Score: 40, Peak: 95, Edge: 1.25, Wet: 0.8, Foot: 0.1, Present: 1.2}
	why := WhyOf(f, 12, 0.4)
	got := map[string]string{}
	for _, w := range why {
		got[w.Name] = w.Value
	}
	assert.Equal(t, "0.210 m² at half contrast (0.300 m² in all)", got["Body area"])
	assert.Equal(t, "0.90 m × 0.35 m", got["Size"])
	assert.Equal(t, "38 % darker than the water", got["Contrast"])
	assert.Equal(t, "0.40 m/s", got["Speed"])
	assert.Equal(t, "12", got["Frames judged"])
	assert.Equal(t, "80 % of it", got["On the water"])
	assert.Equal(t, "0.10 m out (its end nearest the camera)", got["Near end on the deck"])
	assert.Equal(t, "1.20 (its difference from the water in this frame over that in the last second)", got["There in this frame"])
	f.Contrast = 0.2
	assert.Equal(t, "20 % brighter than the water", WhyOf(f, 1, 0)[2].Value)
}

func TestWhyBookKeepsTheLatest(t *testing.T) {
	var b whyBook
	assert.Nil(t, b.get("a.jpg"), "the zero value is empty")
	for i := range whyKeep + 3 {
		b.put(fmt.Sprintf("%d.jpg", i), []console.Feature{{Name: "n", Value: fmt.Sprint(i)}})
	}
	assert.Nil(t, b.get("0.jpg"), "the oldest are forgotten")
	assert.Nil(t, b.get("2.jpg"))
	assert.Equal(t, "3", b.get("3.jpg")[0].Value)
	assert.Equal(t, fmt.Sprint(whyKeep+2), b.get(fmt.Sprintf("%d.jpg", whyKeep+2))[0].Value)
	assert.Len(t, b.order, whyKeep)
}
