//! Rectangles of cells: `rows` x `cols` cells from (`row`, `col`), row 0 at the top.

/// Why a rectangle has no cells on the grid.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum RectProblem {
    /// `rows` or `cols` is zero.
    Empty,
    /// The rectangle reaches past the grid's last row or column.
    Leaves,
}

/// The row-major cell indices of a rectangle on a `width` x `height` grid, in ascending order.
pub fn rect_cells(
    width: u32,
    height: u32,
    row: u32,
    col: u32,
    rows: u32,
    cols: u32,
) -> Result<Vec<u32>, RectProblem> {
    if rows == 0 || cols == 0 {
        return Err(RectProblem::Empty);
    }
    let fits =
        row as u64 + rows as u64 <= height as u64 && col as u64 + cols as u64 <= width as u64;
    if !fits {
        return Err(RectProblem::Leaves);
    }
    Ok((row..row + rows)
        .flat_map(|y| (col..col + cols).map(move |x| y * width + x))
        .collect())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn rectangles_are_row_major_and_stay_on_the_grid() {
        // reference: closed form, cell (r, c) of a 4-wide grid is 4 r + c
        assert_eq!(rect_cells(4, 3, 1, 1, 2, 2), Ok(vec![5, 6, 9, 10]));
        assert_eq!(rect_cells(4, 3, 0, 0, 3, 4).map(|c| c.len()), Ok(12));
        assert_eq!(rect_cells(4, 3, 0, 0, 0, 4), Err(RectProblem::Empty));
        assert_eq!(rect_cells(4, 3, 2, 0, 2, 1), Err(RectProblem::Leaves));
        assert_eq!(
            rect_cells(4, 3, u32::MAX, 0, 1, 1),
            Err(RectProblem::Leaves),
            "no overflow"
        );
    }
}
