package model

// Drawer is implemented by scenarios that can be drawn (the fleet view):
// a map that does not change, the state's items on it, and where each
// robot is and where a control takes it, in the map's coordinates (x to
// the right, y up).
type Drawer interface {
	Map() Map
	// Items are the state's things to draw besides the robots.
	Items(s State) []Item
	// Spot is robot r's position.
	Spot(s State, r int) Point
	// Aim is where control c takes robot r (its Spot when c stays).
	Aim(s State, r, c int) Point
}

// Point is a position on a map.
type Point struct {
	X float64 `json:"x"`
	Y float64 `json:"y"`
}

// Map is a scenario's fixed geometry. Kind "grid": Width x Height cells,
// cell (x, y) centred at (x, y); Kind "graph": Places joined by Links.
type Map struct {
	Kind   string   `json:"kind"`
	Width  int      `json:"width,omitempty"`
	Height int      `json:"height,omitempty"`
	Places []Place  `json:"places,omitempty"`
	Links  [][2]int `json:"links,omitempty"`
	// Flow is a direction things drift in ("N", "S", "E", "W"; "" none).
	Flow string `json:"flow,omitempty"`
}

// Place is a named point of a graph map.
type Place struct {
	Name string  `json:"name"`
	X    float64 `json:"x"`
	Y    float64 `json:"y"`
}

// Item is one thing on the map. Value, in [0, 1], is how much of it there
// is or how bad it is (a site's expected wear); Alarm: past the point the
// scenario acts on (a site likely past its service threshold).
type Item struct {
	Kind  string  `json:"kind"`
	X     float64 `json:"x"`
	Y     float64 `json:"y"`
	Value float64 `json:"value,omitempty"`
	Alarm bool    `json:"alarm,omitempty"`
	Label string  `json:"label,omitempty"`
}
